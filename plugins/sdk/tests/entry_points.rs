//! The entry points that `export_plugin!` generates, called the way the host
//! calls them: through the root descriptor's function table.

#![allow(clippy::unwrap_used, clippy::expect_used, clippy::panic)]

use std::ffi::{c_void, CStr};

use tagwright_plugin_sdk::abi::{self, Slice, SliceMut, TagColumns};
use tagwright_plugin_sdk::{export_plugin, parse_params, Error, Fault, Plugin, Status, Tag, NO_FAULT};

/// Rejects readings above `limit`; errs on tag `ERR`, panics on tag `PANIC`.
struct Limit {
    limit: f64,
}

impl Plugin for Limit {
    fn new(params: &serde_json::Value) -> Result<Self, Error> {
        let limit = params.get("limit").and_then(|v| v.as_f64()).ok_or("parameter `limit` is missing")?;
        Ok(Limit { limit })
    }

    fn process(&self, tag: &mut Tag<'_>) -> Result<(), Error> {
        match tag.name() {
            "ERR" => return Err(Error::new("no good")),
            "PANIC" => panic!("deliberate"),
            _ => {}
        }
        for i in 0..tag.len() {
            if tag.is_clean(i) && tag.raw()[i] > self.limit {
                tag.reject(i, Fault::Spike, tag.raw()[i], self.limit);
            }
        }
        Ok(())
    }
}

export_plugin!(Limit, "limit-test");

fn last_error() -> String {
    let f = unsafe { &*tagwright_plugin_root.functions };
    let mut len = 0usize;
    let p = unsafe { f.last_error.unwrap()(&mut len) };
    String::from_utf8(unsafe { std::slice::from_raw_parts(p, len) }.to_vec()).unwrap()
}

fn create(params: &str) -> Result<*mut c_void, String> {
    let f = unsafe { &*tagwright_plugin_root.functions };
    let mut inst = std::ptr::null_mut();
    match unsafe { f.create.unwrap()(params.as_ptr(), params.len(), &mut inst) } {
        abi::OK => Ok(inst),
        code => Err(format!("{code}: {}", last_error())),
    }
}

struct Cols {
    ts: Vec<i64>,
    raw: Vec<f64>,
    quality: Vec<u8>,
    value: Vec<f64>,
    std: Vec<f64>,
    status: Vec<u8>,
    fault: Vec<u8>,
    stat: Vec<f64>,
    threshold: Vec<f64>,
}

impl Cols {
    fn new(raw: &[f64]) -> Self {
        let n = raw.len();
        Cols {
            ts: (0..n as i64).collect(),
            raw: raw.to_vec(),
            quality: vec![0; n],
            value: raw.to_vec(),
            std: vec![f64::NAN; n],
            status: vec![0; n],
            fault: vec![NO_FAULT; n],
            stat: vec![f64::NAN; n],
            threshold: vec![f64::NAN; n],
        }
    }

    fn process(&mut self, inst: *mut c_void, tag: &str) -> Result<(), (i32, String)> {
        fn m<T>(v: &mut [T]) -> SliceMut<T> {
            SliceMut { ptr: v.as_mut_ptr(), len: v.len() }
        }
        let c = TagColumns {
            size: std::mem::size_of::<TagColumns>(),
            tag: Slice { ptr: tag.as_ptr(), len: tag.len() },
            ts_us: Slice { ptr: self.ts.as_ptr(), len: self.ts.len() },
            raw: Slice { ptr: self.raw.as_ptr(), len: self.raw.len() },
            quality: Slice { ptr: self.quality.as_ptr(), len: self.quality.len() },
            value: m(&mut self.value),
            std: m(&mut self.std),
            status: m(&mut self.status),
            fault: m(&mut self.fault),
            stat: m(&mut self.stat),
            threshold: m(&mut self.threshold),
            period_us: 1,
            range_low: f64::NAN,
            range_high: f64::NAN,
        };
        let f = unsafe { &*tagwright_plugin_root.functions };
        match unsafe { f.process.unwrap()(inst, &c) } {
            abi::OK => Ok(()),
            code => Err((code, last_error())),
        }
    }
}

#[test]
fn the_root_describes_the_plugin() {
    let r = &tagwright_plugin_root;
    assert_eq!(r.magic, u64::from_le_bytes(*b"TAGWPLUG"));
    assert_eq!(r.abi_version, 1);
    assert_eq!(r.struct_size as usize, std::mem::size_of::<abi::PluginRoot>());
    assert_eq!(r.flags & abi::FLAG_PANIC_UNWIND, abi::FLAG_PANIC_UNWIND, "tests build with panic = unwind");
    assert_eq!(unsafe { CStr::from_ptr(r.name) }.to_str().unwrap(), "limit-test");
    assert_eq!(unsafe { CStr::from_ptr(r.version) }.to_str().unwrap(), env!("CARGO_PKG_VERSION"));
    // The fixed header: offsets 0, 8, 12 in every ABI version.
    assert_eq!(std::mem::offset_of!(abi::PluginRoot, abi_version), 8);
    assert_eq!(std::mem::offset_of!(abi::PluginRoot, struct_size), 12);
}

#[test]
fn process_changes_rows_in_place() {
    let inst = create(r#"{"limit": 10}"#).unwrap();
    let mut c = Cols::new(&[1.0, 12.0, 3.0]);
    c.process(inst, "FT-3113.PV").unwrap();
    assert_eq!(c.status, [Status::Ok.code(), Status::Rejected.code(), Status::Ok.code()]);
    assert_eq!(c.fault, [NO_FAULT, Fault::Spike.code(), NO_FAULT]);
    assert!(c.value[1].is_nan() && c.value[0] == 1.0);
    assert_eq!((c.stat[1], c.threshold[1]), (12.0, 10.0));
    unsafe { (*tagwright_plugin_root.functions).release.unwrap()(inst) };
}

#[test]
fn errors_and_panics_become_return_codes() {
    assert!(create(r#"{"limt": 10}"#).unwrap_err().contains("parameter `limit` is missing"));
    assert!(create("{not json").unwrap_err().starts_with("1: the parameters are not JSON"));
    let inst = create(r#"{"limit": 10}"#).unwrap();
    let mut c = Cols::new(&[1.0]);
    assert_eq!(c.process(inst, "ERR"), Err((abi::ERROR, "no good".to_string())));
    let (code, msg) = c.process(inst, "PANIC").unwrap_err();
    assert_eq!(code, abi::PANIC);
    assert!(
        msg.starts_with("panicked at ") && msg.contains("entry_points.rs") && msg.ends_with(": deliberate"),
        "{msg}"
    );
    // The instance still works after a caught panic.
    c.process(inst, "FT-3113.PV").unwrap();
    unsafe { (*tagwright_plugin_root.functions).release.unwrap()(inst) };
}

#[test]
fn bad_columns_are_refused() {
    let inst = create(r#"{"limit": 10}"#).unwrap();
    let mut c = Cols::new(&[1.0, 2.0]);
    c.status[1] = 7;
    assert_eq!(c.process(inst, "FT-3113.PV").unwrap_err().1, "host passed status code 7 at row 1");
    let mut c = Cols::new(&[1.0, 2.0]);
    c.fault.pop();
    assert_eq!(c.process(inst, "FT-3113.PV").unwrap_err().1, "host passed column `fault` with 1 rows, expected 2");
    unsafe { (*tagwright_plugin_root.functions).release.unwrap()(inst) };
}

#[test]
fn typed_parameters() {
    #[derive(Debug, Default, PartialEq, serde::Deserialize)]
    #[serde(deny_unknown_fields)]
    struct P {
        #[serde(default)]
        window: u32,
    }
    assert_eq!(parse_params::<P>(&serde_json::Value::Null).unwrap(), P { window: 0 });
    assert_eq!(parse_params::<P>(&serde_json::json!({"window": 5})).unwrap(), P { window: 5 });
    assert!(parse_params::<P>(&serde_json::json!({"widow": 5})).unwrap_err().message().contains("unknown field"));
}
