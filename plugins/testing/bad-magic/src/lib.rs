//! A root descriptor whose magic number is wrong: the host must refuse it
//! before reading anything else (the other pointers are null on purpose).

use tagwright_plugin_sdk::abi::{PluginRoot, ABI_VERSION, FLAG_PANIC_UNWIND};

#[unsafe(no_mangle)]
#[allow(non_upper_case_globals)]
pub static tagwright_plugin_root: PluginRoot = PluginRoot {
    magic: u64::from_le_bytes(*b"NOTAPLUG"),
    abi_version: ABI_VERSION,
    struct_size: std::mem::size_of::<PluginRoot>() as u32,
    flags: FLAG_PANIC_UNWIND,
    reserved: 0,
    name: std::ptr::null(),
    version: std::ptr::null(),
    functions: std::ptr::null(),
};
