//! The SDK for tagwright's external plugins: a cleaning step in a shared
//! library (a Rust `cdylib`) that tagwright loads at run time, named in a
//! pipeline by path and SHA-256.
//!
//! - [`abi`]: the C ABI itself (root descriptor, function table, columns,
//!   codes, compatibility policy). A plugin in another language implements it.
//! - [`Plugin`]: the safe trait a Rust plugin implements; [`Tag`] is the view
//!   of one tag's columns it works on.
//! - [`export_plugin!`]: exports a [`Plugin`] type as the library's root
//!   descriptor, with every entry point inside `catch_unwind`.
//!
//! This crate depends on `serde_json` and `serde` only; a plugin does not
//! build tagwright, Arrow or Parquet.
//!
//! A plugin that rejects readings above a fixed limit:
//!
//! ```
//! use tagwright_plugin_sdk::{export_plugin, Error, Fault, Plugin, Tag};
//!
//! struct Ceiling {
//!     limit: f64,
//! }
//!
//! impl Plugin for Ceiling {
//!     fn new(params: &serde_json::Value) -> Result<Self, Error> {
//!         let limit = params.get("limit").and_then(|v| v.as_f64()).ok_or("parameter `limit` (a number) is missing")?;
//!         Ok(Ceiling { limit })
//!     }
//!
//!     fn process(&self, tag: &mut Tag<'_>) -> Result<(), Error> {
//!         for i in 0..tag.len() {
//!             if tag.is_clean(i) && tag.raw()[i] > self.limit {
//!                 tag.reject(i, Fault::Range, tag.raw()[i], self.limit);
//!             }
//!         }
//!         Ok(())
//!     }
//! }
//!
//! export_plugin!(Ceiling, "ceiling");
//! # fn main() {}
//! ```
//!
//! tagwright's outputs, including those of plugins, are estimates for
//! reporting and analysis. They do not replace licensed safety-instrumented
//! systems (IEC 61511) or site procedures and must not feed control or
//! protection.

pub mod abi;
mod codes;
#[doc(hidden)]
pub mod export;
mod tag;

pub use abi::{ABI_VERSION, MAGIC, NO_FAULT, ROOT_SYMBOL};
pub use codes::{fault_code, Fault, Quality, Status};
pub use serde_json;
pub use tag::{Columns, Tag};

/// An error a plugin returns: a message for the run summary and provenance
/// (the host adds the plugin and tag names).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Error(String);

impl Error {
    /// An error with `message`.
    pub fn new(message: impl Into<String>) -> Self {
        Error(message.into())
    }

    /// The message.
    pub fn message(&self) -> &str {
        &self.0
    }

    pub(crate) fn into_message(self) -> String {
        self.0
    }
}

impl std::fmt::Display for Error {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Error {}

impl From<String> for Error {
    fn from(s: String) -> Self {
        Error(s)
    }
}

impl From<&str> for Error {
    fn from(s: &str) -> Self {
        Error(s.to_string())
    }
}

impl From<serde_json::Error> for Error {
    fn from(e: serde_json::Error) -> Self {
        Error(e.to_string())
    }
}

/// A cleaning step in an external plugin.
///
/// The host makes one instance per tag (or group of tags) from the step's
/// parameters when the pipeline is loaded and run, and may call
/// [`process`](Plugin::process) on an instance from several threads at once:
/// hence `Send + Sync` and `&self`. Keep instances cheap to make.
pub trait Plugin: Send + Sync + Sized + 'static {
    /// Makes an instance from the step's `params` (JSON; `null` when the
    /// pipeline gives none). An error is reported with the pipeline's file
    /// and line by `tagwright check` and `tagwright run`.
    fn new(params: &serde_json::Value) -> Result<Self, Error>;

    /// Processes one tag in place. An error (or a panic) fails this tag only:
    /// its rows are written with their raw readings and the message goes to
    /// the run summary and provenance.
    fn process(&self, tag: &mut Tag<'_>) -> Result<(), Error>;
}

/// The parameters as a typed struct (`null` gives `T::default()`), for
/// [`Plugin::new`].
pub fn parse_params<T: serde::de::DeserializeOwned + Default>(params: &serde_json::Value) -> Result<T, Error> {
    if params.is_null() {
        return Ok(T::default());
    }
    T::deserialize(params).map_err(|e| Error::new(e.to_string()))
}

/// Exports a [`Plugin`] type as this library's plugin: defines the root
/// descriptor symbol `tagwright_plugin_root` with the name given (1 to 64
/// characters of `A-Z a-z 0-9 _ - .`, checked at compile time) and the
/// crate's version from its `Cargo.toml`. Use it once, at the top level of
/// a `cdylib` crate: `export_plugin!(MyPlugin, "my-plugin");` (see the
/// example in the crate documentation).
#[macro_export]
macro_rules! export_plugin {
    ($plugin:ty, $name:literal) => {
        const _: () =
            assert!($crate::export::valid_name($name), "plugin name: 1 to 64 characters of A-Z a-z 0-9 _ - .");

        #[doc(hidden)]
        mod __tagwright_plugin_entry {
            #[allow(unused_imports)]
            use super::*;

            pub(super) unsafe extern "C" fn create(
                params: *const u8,
                params_len: usize,
                instance_out: *mut *mut ::core::ffi::c_void,
            ) -> i32 {
                // SAFETY: forwarded under the ABI's contract.
                unsafe { $crate::export::create::<$plugin>(params, params_len, instance_out) }
            }

            pub(super) unsafe extern "C" fn process(
                instance: *mut ::core::ffi::c_void,
                columns: *const $crate::abi::TagColumns,
            ) -> i32 {
                // SAFETY: forwarded under the ABI's contract.
                unsafe { $crate::export::process::<$plugin>(instance, columns) }
            }

            pub(super) unsafe extern "C" fn last_error(len_out: *mut usize) -> *const u8 {
                // SAFETY: forwarded under the ABI's contract.
                unsafe { $crate::export::last_error(len_out) }
            }

            pub(super) unsafe extern "C" fn release(instance: *mut ::core::ffi::c_void) {
                // SAFETY: forwarded under the ABI's contract.
                unsafe { $crate::export::release::<$plugin>(instance) }
            }

            pub(super) static FUNCTIONS: $crate::abi::FunctionTable = $crate::abi::FunctionTable {
                size: ::core::mem::size_of::<$crate::abi::FunctionTable>(),
                create: Some(create),
                process: Some(process),
                last_error: Some(last_error),
                release: Some(release),
            };
        }

        /// The plugin's root descriptor, read by the tagwright host.
        #[unsafe(no_mangle)]
        #[allow(non_upper_case_globals)]
        pub static tagwright_plugin_root: $crate::abi::PluginRoot = $crate::abi::PluginRoot {
            magic: $crate::abi::MAGIC,
            abi_version: $crate::abi::ABI_VERSION,
            struct_size: ::core::mem::size_of::<$crate::abi::PluginRoot>() as u32,
            flags: if cfg!(panic = "unwind") { $crate::abi::FLAG_PANIC_UNWIND } else { 0 },
            reserved: 0,
            name: concat!($name, "\0").as_ptr().cast(),
            version: concat!(env!("CARGO_PKG_VERSION"), "\0").as_ptr().cast(),
            functions: &__tagwright_plugin_entry::FUNCTIONS,
        };
    };
}
