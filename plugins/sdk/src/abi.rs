//! The C ABI between tagwright (the host) and an external plugin, version 1.
//!
//! Everything here is `#[repr(C)]`: plain integers, floats, pointers and
//! `extern "C"` function pointers, never a Rust trait object or a type whose
//! layout Rust may change. A plugin written in C declares the same structs.
//!
//! # The root descriptor
//!
//! A plugin exports one data symbol, [`ROOT_SYMBOL`] (`tagwright_plugin_root`),
//! a [`PluginRoot`]. The host reads its first three fields (`magic`,
//! `abi_version`, `struct_size`), which keep their place in every version,
//! and refuses the library unless `magic == MAGIC`, `abi_version ==
//! ABI_VERSION` and `struct_size` is at least the size of the root it knows.
//! Only then does it read the rest and call anything.
//!
//! # Compatibility policy
//!
//! - `abi_version` changes only for a change that breaks old plugins or old
//!   hosts (a field moved, removed or retyped, a function's meaning changed).
//!   A host loads only plugins of its own `abi_version`.
//! - Within one `abi_version`, [`PluginRoot`], [`FunctionTable`] and
//!   [`TagColumns`] only grow, by appending fields at the end; each starts
//!   with (or, for the root, holds) its own size in bytes.
//! - A host accepts a plugin whose root and function table are at least as
//!   long as those of the version it knows, and ignores entries beyond them
//!   (a plugin built with a newer SDK of the same `abi_version` loads in an
//!   older host). A plugin built with an older SDK, whose table lacks an
//!   entry the host needs, is refused with a message saying so.
//! - A plugin accepts a [`TagColumns`] at least as long as version 1's and
//!   reads fields beyond that only after checking `size`.
//!
//! # Codes
//!
//! Columns of enumerations cross as `u8` codes, the discriminants of the
//! host's `Quality`, `Status` and `Fault` (see [`crate::Quality`],
//! [`crate::Status`], [`crate::Fault`]); a fault code of [`NO_FAULT`] (255)
//! means no fault.
//!
//! # Memory and threads
//!
//! - The host owns every column; the plugin may write the `*mut` columns of
//!   [`TagColumns`] during `process` and must not keep any pointer after it
//!   returns. No row can be inserted or removed: the lengths are fixed.
//! - The plugin owns its instances and the text [`LastErrorFn`] returns.
//! - The host may call `process` on one instance from several threads at once;
//!   an instance must be thread-safe (the SDK's [`crate::Plugin`] trait
//!   requires `Send + Sync`).
//! - Error messages are kept per thread, like `errno`: after a call returned
//!   [`ERROR`] or [`PANIC`], `last_error` on the same thread gives its message.
//! - A panic must never unwind out of an entry point (it would abort the
//!   host); the SDK's [`crate::export_plugin!`] catches it and returns
//!   [`PANIC`]. Plugins must be built with `panic = "unwind"` (Cargo's
//!   default): a plugin built with `panic = "abort"` lacks
//!   [`FLAG_PANIC_UNWIND`] and the host refuses it.

use std::ffi::{c_char, c_void};

/// Name of the exported root descriptor symbol.
pub const ROOT_SYMBOL: &str = "tagwright_plugin_root";

/// `b"TAGWPLUG"` read as a little-endian `u64`: marks a tagwright plugin root.
pub const MAGIC: u64 = u64::from_le_bytes(*b"TAGWPLUG");

/// The ABI version this SDK implements.
pub const ABI_VERSION: u32 = 1;

/// [`PluginRoot::flags`] bit: the plugin was built with `panic = "unwind"`,
/// so the SDK's `catch_unwind` can turn a panic into [`PANIC`].
pub const FLAG_PANIC_UNWIND: u32 = 1;

/// Return code: success.
pub const OK: i32 = 0;
/// Return code: the call failed; `last_error` gives the message.
pub const ERROR: i32 = 1;
/// Return code: the plugin panicked (caught); `last_error` gives the message.
pub const PANIC: i32 = 2;

/// Fault code meaning "no fault".
pub const NO_FAULT: u8 = 255;

/// The exported root descriptor (`tagwright_plugin_root`).
///
/// The first three fields keep their offsets (0, 8, 12) in every ABI version.
#[repr(C)]
#[derive(Debug)]
pub struct PluginRoot {
    /// [`MAGIC`].
    pub magic: u64,
    /// [`ABI_VERSION`] of the SDK the plugin was built with.
    pub abi_version: u32,
    /// `size_of::<PluginRoot>()` as the plugin was built.
    pub struct_size: u32,
    /// [`FLAG_PANIC_UNWIND`] and future flags.
    pub flags: u32,
    /// Zero.
    pub reserved: u32,
    /// Plugin name: NUL-terminated UTF-8, 1 to 64 characters of `A-Z a-z 0-9 _ - .`.
    pub name: *const c_char,
    /// Plugin version: NUL-terminated UTF-8, 1 to 64 characters.
    pub version: *const c_char,
    /// The function table.
    pub functions: *const FunctionTable,
}

// SAFETY: a root descriptor is immutable static data that points only to
// other immutable static data (strings and the function table).
unsafe impl Sync for PluginRoot {}

/// Makes an instance from the step's parameters: `params` points to
/// `params_len` bytes of UTF-8 JSON (`null` when the pipeline gives none).
/// On [`OK`] the instance is written to `*instance_out`.
pub type CreateFn = unsafe extern "C" fn(params: *const u8, params_len: usize, instance_out: *mut *mut c_void) -> i32;

/// Processes one tag's columns in place; returns [`OK`], [`ERROR`] or [`PANIC`].
pub type ProcessFn = unsafe extern "C" fn(instance: *mut c_void, columns: *const TagColumns) -> i32;

/// The message of this thread's last failed call: a pointer to UTF-8 bytes
/// (not NUL-terminated), their length written to `*len_out`. Valid until the
/// next call into the plugin on the same thread.
pub type LastErrorFn = unsafe extern "C" fn(len_out: *mut usize) -> *const u8;

/// Releases an instance made by [`CreateFn`]. Called once per instance.
pub type ReleaseFn = unsafe extern "C" fn(instance: *mut c_void);

/// The plugin's entry points. Entries are only ever appended.
#[repr(C)]
#[derive(Debug)]
pub struct FunctionTable {
    /// `size_of::<FunctionTable>()` as the plugin was built.
    pub size: usize,
    pub create: Option<CreateFn>,
    pub process: Option<ProcessFn>,
    pub last_error: Option<LastErrorFn>,
    pub release: Option<ReleaseFn>,
}

/// A read-only column: `len` elements at `ptr` (`ptr` may be dangling or
/// null when `len` is 0).
#[repr(C)]
#[derive(Debug, Clone, Copy)]
pub struct Slice<T> {
    pub ptr: *const T,
    pub len: usize,
}

/// A column the plugin may write: `len` elements at `ptr`.
#[repr(C)]
#[derive(Debug, Clone, Copy)]
pub struct SliceMut<T> {
    pub ptr: *mut T,
    pub len: usize,
}

/// One tag's output table as it crosses the boundary. Every column has the
/// same length, one element per row, rows in time order.
#[repr(C)]
#[derive(Debug)]
pub struct TagColumns {
    /// `size_of::<TagColumns>()` as the host was built.
    pub size: usize,
    /// The tag name, UTF-8 (not NUL-terminated).
    pub tag: Slice<u8>,
    /// Sample times, microseconds since 1970-01-01 UTC, strictly increasing.
    pub ts_us: Slice<i64>,
    /// The readings as read (NaN where the source had none, and on filled rows).
    pub raw: Slice<f64>,
    /// Quality codes ([`crate::Quality`]).
    pub quality: Slice<u8>,
    /// Cleaned values; NaN is written as null.
    pub value: SliceMut<f64>,
    /// Posterior standard deviation of the true value; NaN when none.
    pub std: SliceMut<f64>,
    /// Status codes ([`crate::Status`]).
    pub status: SliceMut<u8>,
    /// Fault codes ([`crate::Fault`]), [`NO_FAULT`] for none.
    pub fault: SliceMut<u8>,
    /// Test statistic behind a row's decision (NaN if none).
    pub stat: SliceMut<f64>,
    /// Threshold it was compared with (NaN if none).
    pub threshold: SliceMut<f64>,
    /// Nominal sampling period of the tag, microseconds.
    pub period_us: i64,
    /// Instrument range of the tag from the pipeline; NaN when not given.
    pub range_low: f64,
    pub range_high: f64,
}
