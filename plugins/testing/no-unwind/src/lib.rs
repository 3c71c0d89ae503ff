//! A root descriptor of the right magic, ABI version and size whose flags do
//! not say `panic = "unwind"`, as a plugin built with `panic = "abort"`
//! would have: the host must refuse it before calling anything (the function
//! table pointer is null on purpose).

use tagwright_plugin_sdk::abi::{PluginRoot, ABI_VERSION, MAGIC};

#[unsafe(no_mangle)]
#[allow(non_upper_case_globals)]
pub static tagwright_plugin_root: PluginRoot = PluginRoot {
    magic: MAGIC,
    abi_version: ABI_VERSION,
    struct_size: std::mem::size_of::<PluginRoot>() as u32,
    flags: 0,
    reserved: 0,
    name: c"no-unwind".as_ptr(),
    version: c"0.0.1".as_ptr(),
    functions: std::ptr::null(),
};
