//! A root descriptor that says ABI version 99: the host must refuse it after
//! reading the first three fields, before reading anything else (the name
//! and function table pointers here are null on purpose).

use tagwright_plugin_sdk::abi::{PluginRoot, FLAG_PANIC_UNWIND, MAGIC};

#[unsafe(no_mangle)]
#[allow(non_upper_case_globals)]
pub static tagwright_plugin_root: PluginRoot = PluginRoot {
    magic: MAGIC,
    abi_version: 99,
    struct_size: std::mem::size_of::<PluginRoot>() as u32,
    flags: FLAG_PANIC_UNWIND,
    reserved: 0,
    name: std::ptr::null(),
    version: std::ptr::null(),
    functions: std::ptr::null(),
};
