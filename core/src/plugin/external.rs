//! External plugins: cleaning steps in shared libraries, loaded at run time
//! through the C ABI of `tagwright-plugin-sdk` (`plugins/sdk`, documented in
//! `docs/plugins.md`).
//!
//! [`load`] checks a plugin before anything in it runs beyond the loader's
//! own initialisation, and refuses it unless all of these hold:
//!
//! 1. `plugins.allow` lists at least one directory, and the plugin file,
//!    with every symbolic link resolved, lies inside one of them (resolved
//!    too);
//! 2. it is a regular file, and on Unix neither the file nor the directory
//!    holding it is writable by group or others (mode bits `0o022` clear):
//!    only its owner can have changed it;
//! 3. the SHA-256 of its bytes is the one the pipeline gives.
//!
//! On Linux the bytes hashed are those of an open file, and the library is
//! loaded through that same open file (`/proc/self/fd/N`), so the file
//! cannot be swapped between the check and the load. Then the root
//! descriptor `tagwright_plugin_root` is read: magic number, ABI version and
//! struct size are checked before any other field is read and before any
//! function is called; then the name, version, the `panic = "unwind"` flag
//! and the function table (at least as long as this host's).
//!
//! A loaded library is never unloaded: it is kept in a process-wide cache
//! (by resolved path and SHA-256), so a pipeline loaded twice shares it, and
//! no code of a plugin can be called after its library was unmapped.
//!
//! [`ExternalPlugin::step`] makes an [`ExternalStep`], which implements
//! [`Step`] like the built-in steps. For each tag it passes the columns,
//! lets the plugin change value, std, status, fault, statistic and
//! threshold in place (rows cannot be inserted or removed), checks what came
//! back and marks the rows it changed as decided by its step.

use std::collections::HashMap;
use std::ffi::c_void;
use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, OnceLock};

use serde::Serialize;
use sha2::{Digest, Sha256};
use tagwright_plugin_sdk::abi::{
    self, CreateFn, FunctionTable, LastErrorFn, PluginRoot, ProcessFn, ReleaseFn, Slice, SliceMut, TagColumns,
};

use super::{Step, StepContext, StepError, TagWork};
use crate::series::{Fault, Status, TagTable};

/// Why a plugin could not be loaded. Each message names the file.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PluginError {
    #[error("`{given}` is not a SHA-256: write the 64 hexadecimal digits that `sha256sum` prints")]
    BadSha256 { given: String },
    #[error("no directory is allowed to hold plugins: list the plugin's directory under `plugins: {{allow: [...]}}`")]
    NoAllowedDirectory,
    #[error("{}: {what}: {source}", path.display())]
    Io {
        path: PathBuf,
        what: &'static str,
        #[source]
        source: std::io::Error,
    },
    #[error("{}: not inside a directory that plugins.allow lists ({allowed}); refusing to load it", path.display())]
    NotAllowed { path: PathBuf, allowed: String },
    #[error("{}: not a regular file", path.display())]
    NotAFile { path: PathBuf },
    #[error(
        "{}: the {what} is writable by group or others (mode {mode:04o}); refusing to load: make it writable by its \
         owner only (chmod go-w)",
        path.display()
    )]
    Writable { path: PathBuf, what: &'static str, mode: u32 },
    #[error(
        "{}: SHA-256 is {actual}, but the pipeline expects {expected}; refusing to load a file other than the one \
         the pipeline names",
        path.display()
    )]
    HashMismatch { path: PathBuf, expected: String, actual: String },
    #[error("{}: cannot load the library: {message}", path.display())]
    Open { path: PathBuf, message: String },
    #[error(
        "{}: not a tagwright plugin: it does not export the symbol `{}` (export it with \
         tagwright_plugin_sdk::export_plugin!)",
        path.display(),
        abi::ROOT_SYMBOL
    )]
    MissingSymbol { path: PathBuf },
    #[error(
        "{}: not a tagwright plugin: its root descriptor starts with {found:#018x}, not the magic number {:#018x}",
        path.display(),
        abi::MAGIC
    )]
    BadMagic { path: PathBuf, found: u64 },
    #[error(
        "{}: plugin ABI version {found}, but this tagwright loads ABI version {}; rebuild the plugin with a \
         tagwright-plugin-sdk of ABI version {}",
        path.display(),
        abi::ABI_VERSION,
        abi::ABI_VERSION
    )]
    AbiVersion { path: PathBuf, found: u32 },
    #[error(
        "{}: the plugin's {what} is {found} bytes, this tagwright needs at least {needed}: rebuild the plugin with a \
         newer tagwright-plugin-sdk",
        path.display()
    )]
    TooShort { path: PathBuf, what: &'static str, found: usize, needed: usize },
    #[error(
        "{}: the plugin was built with panic = \"abort\", so a panic in it would end tagwright; build it with \
         panic = \"unwind\" (Cargo's default)",
        path.display()
    )]
    PanicAbort { path: PathBuf },
    #[error("{}: bad root descriptor: {message}", path.display())]
    BadDescriptor { path: PathBuf, message: String },
}

/// What the provenance `run` record says about a plugin.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct PluginInfo {
    pub name: String,
    pub version: String,
    /// The resolved path it was loaded from.
    pub path: PathBuf,
    pub sha256: String,
}

/// A loaded, checked plugin library.
#[derive(Debug)]
pub struct ExternalPlugin {
    info: PluginInfo,
    create: CreateFn,
    process: ProcessFn,
    last_error: LastErrorFn,
    release: ReleaseFn,
}

impl PartialEq for ExternalPlugin {
    fn eq(&self, other: &Self) -> bool {
        self.info == other.info
    }
}

/// Loaded plugins by (resolved path, SHA-256); never emptied.
type Cache = Mutex<HashMap<(PathBuf, String), Arc<ExternalPlugin>>>;

fn cache() -> &'static Cache {
    static CACHE: OnceLock<Cache> = OnceLock::new();
    CACHE.get_or_init(Default::default)
}

/// A SHA-256 as written in a pipeline: 64 hexadecimal digits, in lower case.
pub fn parse_sha256(given: &str) -> Result<String, PluginError> {
    let s = given.trim();
    if s.len() == 64 && s.bytes().all(|b| b.is_ascii_hexdigit()) {
        Ok(s.to_ascii_lowercase())
    } else {
        Err(PluginError::BadSha256 { given: given.to_string() })
    }
}

/// Loads the plugin at `path` if it passes the checks of the module
/// documentation; `allowed` are the directories of `plugins.allow`.
pub fn load(path: &Path, sha256: &str, allowed: &[PathBuf]) -> Result<Arc<ExternalPlugin>, PluginError> {
    let expected = parse_sha256(sha256)?;
    let (canonical, file) = open_checked(path, allowed)?;
    let actual = {
        let mut h = Sha256::new();
        let mut buf = vec![0u8; 1 << 16];
        let mut f = &file;
        loop {
            let n = f.read(&mut buf).map_err(|source| PluginError::Io {
                path: canonical.clone(),
                what: "cannot read the plugin",
                source,
            })?;
            if n == 0 {
                break;
            }
            h.update(&buf[..n]);
        }
        hex::encode(h.finalize())
    };
    if actual != expected {
        return Err(PluginError::HashMismatch { path: canonical, expected, actual });
    }
    let key = (canonical.clone(), actual.clone());
    let mut cache = cache().lock().unwrap_or_else(|p| p.into_inner());
    if let Some(p) = cache.get(&key) {
        return Ok(p.clone());
    }
    let lib = open_library(&canonical, file)?;
    // SAFETY: the library stays loaded for the life of the process (leaked).
    let plugin = Arc::new(unsafe { read_root(lib, canonical, actual) }?);
    cache.insert(key, plugin.clone());
    Ok(plugin)
}

/// Resolves `path`, checks it lies in an allowed directory and has safe
/// permissions, and opens it.
fn open_checked(path: &Path, allowed: &[PathBuf]) -> Result<(PathBuf, File), PluginError> {
    if allowed.is_empty() {
        return Err(PluginError::NoAllowedDirectory);
    }
    let canonical = std::fs::canonicalize(path).map_err(|source| PluginError::Io {
        path: path.to_path_buf(),
        what: "cannot find the plugin",
        source,
    })?;
    let inside = allowed.iter().filter_map(|d| std::fs::canonicalize(d).ok()).any(|d| canonical.starts_with(&d));
    if !inside {
        let allowed = allowed.iter().map(|d| d.display().to_string()).collect::<Vec<_>>().join(", ");
        return Err(PluginError::NotAllowed { path: canonical, allowed });
    }
    let file = File::open(&canonical).map_err(|source| PluginError::Io {
        path: canonical.clone(),
        what: "cannot open the plugin",
        source,
    })?;
    let meta = file.metadata().map_err(|source| PluginError::Io {
        path: canonical.clone(),
        what: "cannot read the plugin's metadata",
        source,
    })?;
    if !meta.is_file() {
        return Err(PluginError::NotAFile { path: canonical });
    }
    check_not_shared_writable(&canonical, &meta, "file")?;
    if let Some(dir) = canonical.parent() {
        let dmeta = std::fs::metadata(dir).map_err(|source| PluginError::Io {
            path: dir.to_path_buf(),
            what: "cannot read the plugin directory's metadata",
            source,
        })?;
        check_not_shared_writable(dir, &dmeta, "directory")?;
    }
    Ok((canonical, file))
}

/// Errs when `meta`'s mode lets group or others write (Unix); elsewhere no check.
fn check_not_shared_writable(path: &Path, meta: &std::fs::Metadata, what: &'static str) -> Result<(), PluginError> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let mode = meta.permissions().mode() & 0o7777;
        if mode & 0o022 != 0 {
            return Err(PluginError::Writable { path: path.to_path_buf(), what, mode });
        }
    }
    #[cfg(not(unix))]
    let _ = (path, meta, what);
    Ok(())
}

/// Loads the library, through the already opened `file` where the system
/// allows it; both stay open and loaded for the life of the process.
fn open_library(path: &Path, file: File) -> Result<&'static libloading::Library, PluginError> {
    let open = |p: &Path| {
        // SAFETY: loading runs the library's initialisers. This is the one
        // step that trusts the file before its descriptor is checked; the
        // location, permission and SHA-256 checks above are what make it
        // acceptable.
        unsafe { libloading::Library::new(p) }
            .map_err(|e| PluginError::Open { path: path.to_path_buf(), message: e.to_string() })
    };
    #[cfg(target_os = "linux")]
    let lib = {
        use std::os::fd::AsRawFd;
        let via_fd = PathBuf::from(format!("/proc/self/fd/{}", file.as_raw_fd()));
        let lib = if via_fd.exists() { open(&via_fd)? } else { open(path)? };
        // The loader knows the library by this name: the descriptor must
        // never be reused for another file, so it stays open.
        std::mem::forget(file);
        lib
    };
    #[cfg(not(target_os = "linux"))]
    let lib = {
        drop(file);
        open(path)?
    };
    Ok(Box::leak(Box::new(lib)))
}

/// Reads a NUL-terminated UTF-8 string of 1 to `max` bytes.
///
/// # Safety
/// `p` is null or points to readable bytes up to a NUL or `max + 1` bytes.
unsafe fn c_text(p: *const std::ffi::c_char, max: usize) -> Result<String, String> {
    if p.is_null() {
        return Err("null".into());
    }
    let mut bytes = Vec::new();
    for i in 0..=max {
        // SAFETY: the caller's contract; stops at the first NUL.
        let b = unsafe { p.add(i).cast::<u8>().read() };
        if b == 0 {
            break;
        }
        if i == max {
            return Err(format!("longer than {max} bytes"));
        }
        bytes.push(b);
    }
    if bytes.is_empty() {
        return Err("empty".into());
    }
    String::from_utf8(bytes).map_err(|_| "not UTF-8".into())
}

/// Reads and checks the root descriptor and the function table.
///
/// # Safety
/// `lib` stays loaded for the life of the process.
unsafe fn read_root(
    lib: &'static libloading::Library,
    path: PathBuf,
    sha256: String,
) -> Result<ExternalPlugin, PluginError> {
    let symbol = format!("{}\0", abi::ROOT_SYMBOL);
    // SAFETY: a data symbol; its value is the address of the descriptor.
    let root: *const PluginRoot = match unsafe { lib.get::<*const PluginRoot>(symbol.as_bytes()) } {
        Ok(s) => *s,
        Err(_) => return Err(PluginError::MissingSymbol { path }),
    };
    let bad = |path: PathBuf, message: String| PluginError::BadDescriptor { path, message };
    if root.is_null() || !root.is_aligned() {
        return Err(bad(path, "the symbol's address is null or misaligned".into()));
    }
    // SAFETY: the first 16 bytes (magic, abi_version, struct_size) are the
    // same in every ABI version; nothing beyond them is read until they pass.
    let (magic, version, size) = unsafe {
        (
            std::ptr::addr_of!((*root).magic).read(),
            std::ptr::addr_of!((*root).abi_version).read(),
            std::ptr::addr_of!((*root).struct_size).read(),
        )
    };
    if magic != abi::MAGIC {
        return Err(PluginError::BadMagic { path, found: magic });
    }
    if version != abi::ABI_VERSION {
        return Err(PluginError::AbiVersion { path, found: version });
    }
    let needed = std::mem::size_of::<PluginRoot>();
    if (size as usize) < needed {
        return Err(PluginError::TooShort { path, what: "root descriptor", found: size as usize, needed });
    }
    // SAFETY: the plugin declares at least `needed` bytes of descriptor.
    let r = unsafe { &*root };
    // SAFETY: NUL-terminated strings per the ABI; reading is bounded.
    let name = unsafe { c_text(r.name, 64) }.map_err(|e| bad(path.clone(), format!("plugin name: {e}")))?;
    if !tagwright_plugin_sdk::export::valid_name(&name) {
        return Err(bad(path, format!("plugin name `{name}`: use 1 to 64 characters of A-Z a-z 0-9 _ - .")));
    }
    // SAFETY: as above.
    let plugin_version = unsafe { c_text(r.version, 64) }.map_err(|e| bad(path.clone(), format!("version: {e}")))?;
    if r.flags & abi::FLAG_PANIC_UNWIND == 0 {
        return Err(PluginError::PanicAbort { path });
    }
    let table = r.functions;
    if table.is_null() || !table.is_aligned() {
        return Err(bad(path, "the function table pointer is null or misaligned".into()));
    }
    // SAFETY: `size` is the table's first field in every version.
    let table_size = unsafe { std::ptr::addr_of!((*table).size).read() };
    let needed = std::mem::size_of::<FunctionTable>();
    if table_size < needed {
        return Err(PluginError::TooShort { path, what: "function table", found: table_size, needed });
    }
    // SAFETY: the plugin declares at least `needed` bytes of table.
    let t = unsafe { &*table };
    let missing = |f: &str| bad(path.clone(), format!("function `{f}` is null"));
    Ok(ExternalPlugin {
        create: t.create.ok_or_else(|| missing("create"))?,
        process: t.process.ok_or_else(|| missing("process"))?,
        last_error: t.last_error.ok_or_else(|| missing("last_error"))?,
        release: t.release.ok_or_else(|| missing("release"))?,
        info: PluginInfo { name, version: plugin_version, path, sha256 },
    })
}

impl ExternalPlugin {
    /// Name, version, path and SHA-256.
    pub fn info(&self) -> &PluginInfo {
        &self.info
    }

    /// The message of a failed call on this thread.
    fn error_message(&self, code: i32) -> String {
        let mut len = 0usize;
        // SAFETY: `last_error` per the ABI; the text is copied at once.
        let text = unsafe {
            let p = (self.last_error)(&mut len);
            if p.is_null() {
                String::new()
            } else {
                String::from_utf8_lossy(std::slice::from_raw_parts(p, len.min(64 * 1024))).into_owned()
            }
        };
        let text = if text.is_empty() { "no message".to_string() } else { text };
        match code {
            abi::ERROR => format!("plugin `{}`: {text}", self.info.name),
            abi::PANIC => format!("plugin `{}` panicked (caught in the plugin): {text}", self.info.name),
            other => format!("plugin `{}` returned the unknown code {other}: {text}", self.info.name),
        }
    }

    /// Makes a step: an instance of the plugin for the step's `params`
    /// (`null` when none). `Err` carries the plugin's message.
    pub fn step(self: &Arc<Self>, params: &serde_json::Value) -> Result<Arc<dyn Step>, String> {
        let text = params.to_string();
        let mut instance: *mut c_void = std::ptr::null_mut();
        // SAFETY: `create` per the ABI: the text outlives the call.
        let code = unsafe { (self.create)(text.as_ptr(), text.len(), &mut instance) };
        if code != abi::OK {
            return Err(self.error_message(code));
        }
        if instance.is_null() {
            return Err(format!("plugin `{}`: create returned no instance", self.info.name));
        }
        Ok(Arc::new(ExternalStep { label: format!("plugin:{}", self.info.name), plugin: self.clone(), instance }))
    }
}

/// A step of an external plugin: one instance, released when dropped.
pub struct ExternalStep {
    plugin: Arc<ExternalPlugin>,
    instance: *mut c_void,
    label: String,
}

// SAFETY: the ABI requires instances to be usable from any thread, also at
// once (the SDK's trait is `Send + Sync` and `process` takes `&self`).
unsafe impl Send for ExternalStep {}
// SAFETY: as above.
unsafe impl Sync for ExternalStep {}

impl Drop for ExternalStep {
    fn drop(&mut self) {
        // SAFETY: made by `create`, released once, here.
        unsafe { (self.plugin.release)(self.instance) };
    }
}

impl std::fmt::Debug for ExternalStep {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ExternalStep").field("plugin", &self.plugin.info).finish()
    }
}

fn fault_code(f: Option<Fault>) -> u8 {
    f.map_or(abi::NO_FAULT, |f| f as u8)
}

fn status_of(code: u8) -> Option<Status> {
    Status::ALL.get(usize::from(code)).copied()
}

fn fault_of(code: u8) -> Option<Option<Fault>> {
    if code == abi::NO_FAULT {
        Some(None)
    } else {
        Fault::ALL.get(usize::from(code)).map(|&f| Some(f))
    }
}

/// Equal, or both NaN.
fn same(a: f64, b: f64) -> bool {
    a == b || (a.is_nan() && b.is_nan())
}

/// The bytes of a slice of plain values (no padding, no invalid bit patterns
/// when read as bytes: `u8`-represented enums, `f64`).
fn bytes<T: Copy>(v: &[T]) -> &[u8] {
    // SAFETY: callers pass `repr(u8)` enums or `f64`, which have no padding;
    // any initialised memory is valid as `u8`; the length covers exactly `v`.
    unsafe { std::slice::from_raw_parts(v.as_ptr().cast::<u8>(), std::mem::size_of_val(v)) }
}

/// Buffers of the crossing, kept per thread and reused from tag to tag.
#[derive(Default)]
struct Scratch {
    status: Vec<u8>,
    fault: Vec<u8>,
    fault_before: Vec<u8>,
    value_before: Vec<f64>,
}

thread_local! {
    static SCRATCH: std::cell::RefCell<Scratch> = std::cell::RefCell::new(Scratch::default());
}

/// Rows compared at once when looking for what the plugin changed.
const CHUNK: usize = 512;

impl ExternalStep {
    /// Runs the plugin on one tag and applies what it changed.
    fn process(&self, work: &mut TagWork, ctx: &StepContext) -> Result<(), String> {
        SCRATCH.with(|s| match s.try_borrow_mut() {
            Ok(mut s) => self.process_with(&mut s, work, ctx),
            // Not reachable (nothing calls back into the host during
            // `process`); fresh buffers keep it correct anyway.
            Err(_) => self.process_with(&mut Scratch::default(), work, ctx),
        })
    }

    fn process_with(&self, s: &mut Scratch, work: &mut TagWork, ctx: &StepContext) -> Result<(), String> {
        let t = &mut work.table;
        let n = t.len();
        // `Status` is `repr(u8)`: its values are its codes.
        s.status.clear();
        s.status.extend_from_slice(bytes(&t.status));
        s.fault.clear();
        s.fault.extend(t.fault.iter().map(|&f| fault_code(f)));
        s.fault_before.clear();
        s.fault_before.extend_from_slice(&s.fault);
        s.value_before.clear();
        s.value_before.extend_from_slice(&t.value);
        let (lo, hi) = work.settings.range.unwrap_or((f64::NAN, f64::NAN));
        fn m<T>(v: &mut [T]) -> SliceMut<T> {
            SliceMut { ptr: v.as_mut_ptr(), len: v.len() }
        }
        let cols = TagColumns {
            size: std::mem::size_of::<TagColumns>(),
            tag: Slice { ptr: t.tag.as_ptr(), len: t.tag.len() },
            ts_us: Slice { ptr: t.ts_us.as_ptr(), len: n },
            raw: Slice { ptr: t.raw.as_ptr(), len: t.raw.len() },
            // `Quality` is `repr(u8)`: its values are its codes.
            quality: Slice { ptr: t.quality.as_ptr().cast::<u8>(), len: t.quality.len() },
            value: m(&mut t.value),
            std: m(&mut t.std),
            status: m(&mut s.status),
            fault: m(&mut s.fault),
            stat: m(&mut t.stat),
            threshold: m(&mut t.threshold),
            period_us: t.period_us,
            range_low: lo,
            range_high: hi,
        };
        // SAFETY: every column holds `n` elements and outlives the call; the
        // writable ones are distinct buffers; nothing else touches them meanwhile.
        let code = unsafe { (self.plugin.process)(self.instance, &cols) };
        if code != abi::OK {
            return Err(self.plugin.error_message(code));
        }
        // Most rows are unchanged: compare chunk by chunk as bytes (a value
        // counts as changed when its bits differ), and look at the rows of a
        // chunk only when something in it differs.
        let mut start = 0;
        while start < n {
            let end = (start + CHUNK).min(n);
            let r = start..end;
            let same_chunk = s.status[r.clone()] == *bytes(&t.status[r.clone()])
                && s.fault[r.clone()] == s.fault_before[r.clone()]
                && bytes(&s.value_before[r.clone()]) == bytes(&t.value[r.clone()]);
            if !same_chunk {
                for i in r {
                    check_row(t, i, s.status[i], s.fault[i], s.value_before[i], ctx.index)?;
                }
            }
            start = end;
        }
        Ok(())
    }
}

/// Checks row `i` after the plugin ran (status and fault codes as it left
/// them, the value before it ran) and applies a change.
fn check_row(t: &mut TagTable, i: usize, s: u8, f: u8, value_before: f64, step: u16) -> Result<(), String> {
    let (old_s, old_f) = (t.status[i], t.fault[i]);
    // A value counts as changed unless equal or both NaN.
    if s == old_s as u8 && f == fault_code(old_f) && same(value_before, t.value[i]) {
        return Ok(());
    }
    let at = || format!("row {i} ({})", crate::io::format_ts_us(t.ts_us[i]));
    let Some(new_s) = status_of(s) else {
        return Err(format!("{}: status code {s} is not a status (0 ok, 1 filled, 2 replaced, 3 rejected)", at()));
    };
    let Some(new_f) = fault_of(f) else {
        return Err(format!(
            "{}: fault code {f} is not a fault (0 spike, 1 stuck, 2 step, 3 drift, 4 noise, 5 range, 6 bad_quality, \
             255 none)",
            at()
        ));
    };
    if (new_s == Status::Filled) != (old_s == Status::Filled) {
        return Err(format!(
            "{}: status changed from {} to {}; only the host inserts rows (status filled)",
            at(),
            old_s.as_str(),
            new_s.as_str()
        ));
    }
    if new_s == Status::Ok && !same(t.value[i], t.raw[i]) {
        return Err(format!(
            "{}: status ok with a value other than the reading; a kept row's value is its reading (give an \
             estimate with status replaced)",
            at()
        ));
    }
    if new_s == Status::Rejected && !t.value[i].is_nan() {
        return Err(format!("{}: status rejected with a value; a rejected row has no value (NaN)", at()));
    }
    t.status[i] = new_s;
    t.fault[i] = new_f;
    t.decided_by[i] = step;
    Ok(())
}

impl Step for ExternalStep {
    fn name(&self) -> &str {
        &self.label
    }

    fn version(&self) -> String {
        self.plugin.info.version.clone()
    }

    fn apply(&self, tags: &mut [TagWork], ctx: &StepContext) -> Result<(), StepError> {
        for work in tags.iter_mut() {
            self.process(work, ctx).map_err(|message| StepError::Failed {
                step: self.label.clone(),
                message: format!("tag {}: {message}", work.table.tag),
            })?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tagwright_plugin_sdk as sdk;

    /// The SDK's codes are the host's discriminants and names.
    #[test]
    fn codes_agree_with_the_sdk() {
        assert_eq!(sdk::Status::ALL.len(), Status::ALL.len());
        for (a, b) in sdk::Status::ALL.iter().zip(Status::ALL) {
            assert_eq!((a.code(), a.as_str()), (b as u8, b.as_str()));
        }
        assert_eq!(sdk::Fault::ALL.len(), Fault::ALL.len());
        for (a, b) in sdk::Fault::ALL.iter().zip(Fault::ALL) {
            assert_eq!((a.code(), a.as_str()), (b as u8, b.as_str()));
        }
        use crate::series::Quality;
        for (a, b) in sdk::Quality::ALL.iter().zip([Quality::Good, Quality::Uncertain, Quality::Bad]) {
            assert_eq!(a.code(), b as u8);
        }
        assert_eq!(sdk::Quality::ALL.len(), 3);
        assert!(Fault::ALL.len() < usize::from(abi::NO_FAULT));
        assert_eq!(status_of(3), Some(Status::Rejected));
        assert_eq!(status_of(4), None);
        assert_eq!(fault_of(255), Some(None));
        assert_eq!(fault_of(6), Some(Some(Fault::BadQuality)));
        assert_eq!(fault_of(7), None);
    }

    #[test]
    fn sha256_text() {
        let h = "A".repeat(64);
        assert_eq!(parse_sha256(&format!(" {h} ")).unwrap(), "a".repeat(64));
        for bad in ["", "abc", &"g".repeat(64), &"a".repeat(63), &"a".repeat(65)] {
            let e = parse_sha256(bad).unwrap_err().to_string();
            assert!(e.contains("is not a SHA-256"), "{e}");
        }
    }

    #[test]
    fn location_and_permission_rules() {
        let dir = tempfile::tempdir().unwrap();
        let allowed = dir.path().join("allowed");
        let other = dir.path().join("other");
        std::fs::create_dir_all(&allowed).unwrap();
        std::fs::create_dir_all(&other).unwrap();
        let inside = allowed.join("p.so");
        let outside = other.join("p.so");
        std::fs::write(&inside, b"not a library").unwrap();
        std::fs::write(&outside, b"not a library").unwrap();
        let sha = hex::encode(Sha256::digest(b"not a library"));

        let e = load(&inside, &sha, &[]).unwrap_err();
        assert!(matches!(e, PluginError::NoAllowedDirectory), "{e}");
        let e = load(&outside, &sha, std::slice::from_ref(&allowed)).unwrap_err();
        assert!(matches!(e, PluginError::NotAllowed { .. }), "{e}");
        // A link inside the allowed directory to a file outside it is outside.
        #[cfg(unix)]
        {
            let link = allowed.join("link.so");
            std::os::unix::fs::symlink(&outside, &link).unwrap();
            let e = load(&link, &sha, std::slice::from_ref(&allowed)).unwrap_err();
            assert!(matches!(e, PluginError::NotAllowed { .. }), "{e}");
        }
        // `..` is resolved before the check.
        let sneaky = allowed.join("..").join("other").join("p.so");
        assert!(matches!(load(&sneaky, &sha, std::slice::from_ref(&allowed)), Err(PluginError::NotAllowed { .. })));
        let e = load(&allowed.join("missing.so"), &sha, std::slice::from_ref(&allowed)).unwrap_err();
        assert!(e.to_string().contains("cannot find the plugin"), "{e}");
        let e = load(&allowed, &sha, std::slice::from_ref(&allowed)).unwrap_err();
        assert!(matches!(e, PluginError::NotAFile { .. }), "{e}");

        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let set = |p: &Path, mode: u32| std::fs::set_permissions(p, std::fs::Permissions::from_mode(mode)).unwrap();
            set(&allowed, 0o755);
            set(&inside, 0o664);
            let e = load(&inside, &sha, std::slice::from_ref(&allowed)).unwrap_err();
            assert!(matches!(e, PluginError::Writable { what: "file", mode: 0o664, .. }), "{e}");
            set(&inside, 0o644);
            set(&allowed, 0o777);
            let e = load(&inside, &sha, std::slice::from_ref(&allowed)).unwrap_err();
            assert!(matches!(e, PluginError::Writable { what: "directory", .. }), "{e}");
            assert!(e.to_string().contains("mode 0777"), "{e}");
            set(&allowed, 0o755);
        }
        // Right place and permissions, wrong hash.
        let e = load(&inside, &"0".repeat(64), std::slice::from_ref(&allowed)).unwrap_err();
        assert!(matches!(e, PluginError::HashMismatch { .. }), "{e}");
        assert!(e.to_string().contains(&format!("SHA-256 is {sha}")), "{e}");
        // Right hash, not a library.
        let e = load(&inside, &sha, std::slice::from_ref(&allowed)).unwrap_err();
        assert!(matches!(e, PluginError::Open { .. }), "{e}");
    }
}
