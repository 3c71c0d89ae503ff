//! A shared library that exports a function but no `tagwright_plugin_root`:
//! the host must report the missing symbol.

/// Something else a library might export.
#[unsafe(no_mangle)]
pub extern "C" fn not_a_tagwright_plugin() -> i32 {
    42
}
