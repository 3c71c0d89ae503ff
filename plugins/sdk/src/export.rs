//! The entry points behind [`crate::export_plugin!`]: each turns the C call
//! into a call of the safe [`Plugin`] trait inside `catch_unwind`, so that a
//! panic becomes the return code [`PANIC`] with a message, never an unwind
//! into the host (which would abort it).

use std::cell::RefCell;
use std::ffi::c_void;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::Once;

use crate::abi::{TagColumns, ERROR, OK, PANIC};
use crate::{Error, Plugin, Tag};

thread_local! {
    /// This thread's last error message (see `LastErrorFn`).
    static LAST_ERROR: RefCell<String> = const { RefCell::new(String::new()) };
    /// Where this thread's last panic happened, recorded by the panic hook.
    static PANIC_AT: RefCell<Option<String>> = const { RefCell::new(None) };
}

/// Replaces the plugin's panic hook (the plugin's own copy of the standard
/// library's, not the host's) by one that records the location instead of
/// printing: the host reports the panic with its message and location.
fn install_panic_hook() {
    static HOOK: Once = Once::new();
    HOOK.call_once(|| {
        std::panic::set_hook(Box::new(|info| {
            let at = info.location().map(|l| format!("{}:{}:{}", l.file(), l.line(), l.column()));
            let _ = PANIC_AT.try_with(|p| *p.borrow_mut() = at);
        }));
    });
}

fn set_error(message: String) {
    let _ = LAST_ERROR.try_with(|e| *e.borrow_mut() = message);
}

/// Runs `f`, turning an error into [`ERROR`] and a panic into [`PANIC`],
/// each with its message kept for `last_error`.
fn guard(f: impl FnOnce() -> Result<(), Error>) -> i32 {
    install_panic_hook();
    match catch_unwind(AssertUnwindSafe(f)) {
        Ok(Ok(())) => OK,
        Ok(Err(e)) => {
            set_error(e.into_message());
            ERROR
        }
        Err(payload) => {
            let what = payload
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| payload.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "a panic with a non-text payload".to_string());
            let at = PANIC_AT.try_with(|p| p.borrow_mut().take()).ok().flatten();
            set_error(match at {
                Some(at) => format!("panicked at {at}: {what}"),
                None => format!("panicked: {what}"),
            });
            // Dropping the payload could itself panic; it is leaked instead.
            std::mem::forget(payload);
            PANIC
        }
    }
}

/// `CreateFn` for plugin type `P`.
///
/// # Safety
/// `params` points to `params_len` readable bytes (or `params_len` is 0);
/// `instance_out` is valid for a write.
pub unsafe fn create<P: Plugin>(params: *const u8, params_len: usize, instance_out: *mut *mut c_void) -> i32 {
    guard(|| {
        if instance_out.is_null() {
            return Err(Error::new("host passed a null instance_out"));
        }
        let bytes: &[u8] = if params_len == 0 {
            &[]
        } else if params.is_null() {
            return Err(Error::new("host passed null parameters with a non-zero length"));
        } else {
            // SAFETY: the caller's contract.
            unsafe { std::slice::from_raw_parts(params, params_len) }
        };
        let text = std::str::from_utf8(bytes).map_err(|_| Error::new("the parameters are not UTF-8"))?;
        let value = if text.trim().is_empty() {
            serde_json::Value::Null
        } else {
            serde_json::from_str(text).map_err(|e| Error::new(format!("the parameters are not JSON: {e}")))?
        };
        let plugin = P::new(&value)?;
        // SAFETY: checked non-null above; the caller's contract.
        unsafe { *instance_out = Box::into_raw(Box::new(plugin)).cast() };
        Ok(())
    })
}

/// `ProcessFn` for plugin type `P`.
///
/// # Safety
/// `instance` was made by [`create`] for the same `P` and not released;
/// `columns` is valid as [`TagColumns`] documents.
pub unsafe fn process<P: Plugin>(instance: *mut c_void, columns: *const TagColumns) -> i32 {
    guard(|| {
        if instance.is_null() || columns.is_null() {
            return Err(Error::new("host passed a null instance or null columns"));
        }
        // SAFETY: the caller's contract; the instance is only read (`P: Sync`).
        let plugin = unsafe { &*instance.cast::<P>() };
        // SAFETY: the caller's contract.
        let mut tag = unsafe { Tag::from_columns(&*columns)? };
        plugin.process(&mut tag)
    })
}

/// `LastErrorFn`.
///
/// # Safety
/// `len_out` is valid for a write.
pub unsafe fn last_error(len_out: *mut usize) -> *const u8 {
    let got = catch_unwind(|| LAST_ERROR.try_with(|e| (e.borrow().as_ptr(), e.borrow().len())).ok());
    let (ptr, len) = match got {
        Ok(Some(v)) => v,
        _ => (std::ptr::null(), 0),
    };
    if !len_out.is_null() {
        // SAFETY: the caller's contract.
        unsafe { *len_out = len };
    }
    ptr
}

/// `ReleaseFn` for plugin type `P`.
///
/// # Safety
/// `instance` was made by [`create`] for the same `P` and is released once.
pub unsafe fn release<P: Plugin>(instance: *mut c_void) {
    let _ = guard(|| {
        if !instance.is_null() {
            // SAFETY: the caller's contract: made by `Box::into_raw` in `create`.
            drop(unsafe { Box::from_raw(instance.cast::<P>()) });
        }
        Ok(())
    });
}

/// Checks a plugin name at compile time (see `PluginRoot::name`).
pub const fn valid_name(name: &str) -> bool {
    let b = name.as_bytes();
    if b.is_empty() || b.len() > 64 {
        return false;
    }
    let mut i = 0;
    while i < b.len() {
        let c = b[i];
        if !(c.is_ascii_alphanumeric() || c == b'_' || c == b'-' || c == b'.') {
            return false;
        }
        i += 1;
    }
    true
}
