//! Typed views of Arrow columns for the Parquet readers: string (tag, text
//! quality), time, numeric value and quality columns in every layout the
//! readers accept.

use arrow_array::cast::AsArray;
use arrow_array::types::{
    Float32Type, Float64Type, Int16Type, Int32Type, Int64Type, Int8Type, TimestampMicrosecondType,
    TimestampMillisecondType, TimestampNanosecondType, TimestampSecondType, UInt16Type, UInt32Type, UInt64Type,
    UInt8Type,
};
use arrow_array::{Array, BooleanArray, PrimitiveArray, StringViewArray};
use arrow_schema::{DataType, TimeUnit};

use super::quality::RawQuality;
use crate::pipeline::EpochUnit;

/// Types accepted for a tag column.
pub(super) const TAG_TYPES: &str = "a string (Utf8, LargeUtf8, Utf8View, or a dictionary of strings)";
/// Types accepted for a time column.
pub(super) const TIME_TYPES: &str =
    "a timestamp (any unit, with or without time zone) or an Int64/Int32 epoch in the pipeline's epoch unit";
/// Types accepted for a value column (and for the tag columns of a wide file).
pub(super) const VALUE_TYPES: &str = "numeric (Float64/32, Int64/32/16/8, UInt64/32/16/8, or Boolean as 0/1)";
/// Types accepted for a quality column.
pub(super) const QUALITY_TYPES: &str = "an integer (Int8-64, UInt8-64) or a string (or a dictionary of strings)";

pub(super) fn is_string(t: &DataType) -> bool {
    matches!(t, DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View)
}

/// A string column, or a dictionary of strings.
pub(super) fn is_string_like(t: &DataType) -> bool {
    match t {
        DataType::Dictionary(_, v) => is_string(v),
        t => is_string(t),
    }
}

pub(super) fn is_time(t: &DataType) -> bool {
    matches!(t, DataType::Timestamp(..) | DataType::Int64 | DataType::Int32)
}

pub(super) fn is_integer(t: &DataType) -> bool {
    matches!(
        t,
        DataType::Int8
            | DataType::Int16
            | DataType::Int32
            | DataType::Int64
            | DataType::UInt8
            | DataType::UInt16
            | DataType::UInt32
            | DataType::UInt64
    )
}

pub(super) fn is_numeric(t: &DataType) -> bool {
    is_integer(t) || matches!(t, DataType::Float64 | DataType::Float32 | DataType::Boolean)
}

/// A timestamp type without a zone: its values are local wall-clock times.
pub(super) fn is_naive_timestamp(t: &DataType) -> bool {
    matches!(t, DataType::Timestamp(_, None))
}

/// A string column of any of the accepted layouts.
pub(super) enum StrCol<'a> {
    Utf8(&'a arrow_array::StringArray),
    Large(&'a arrow_array::LargeStringArray),
    View(&'a StringViewArray),
}

impl<'a> StrCol<'a> {
    pub(super) fn new(a: &'a dyn Array) -> Option<Self> {
        match a.data_type() {
            DataType::Utf8 => a.as_string_opt::<i32>().map(StrCol::Utf8),
            DataType::LargeUtf8 => a.as_string_opt::<i64>().map(StrCol::Large),
            DataType::Utf8View => a.as_string_view_opt().map(StrCol::View),
            _ => None,
        }
    }

    pub(super) fn get(&self, i: usize) -> Option<&'a str> {
        match self {
            StrCol::Utf8(a) => (!a.is_null(i)).then(|| a.value(i)),
            StrCol::Large(a) => (!a.is_null(i)).then(|| a.value(i)),
            StrCol::View(a) => (!a.is_null(i)).then(|| a.value(i)),
        }
    }

    pub(super) fn len(&self) -> usize {
        match self {
            StrCol::Utf8(a) => a.len(),
            StrCol::Large(a) => a.len(),
            StrCol::View(a) => a.len(),
        }
    }
}

/// A string column or a dictionary of strings. Rows of a dictionary are
/// told apart by key, so equal neighbours cost one comparison of integers.
pub(super) enum TextCol<'a> {
    Plain(StrCol<'a>),
    /// `nulls`: the column itself, when it has a null row.
    Dict {
        keys: Keys<'a>,
        nulls: Option<&'a dyn Array>,
        values: StrCol<'a>,
    },
}

/// The keys of a dictionary column, in their own integer type.
pub(super) enum Keys<'a> {
    I8(&'a [i8]),
    I16(&'a [i16]),
    I32(&'a [i32]),
    I64(&'a [i64]),
    U8(&'a [u8]),
    U16(&'a [u16]),
    U32(&'a [u32]),
    U64(&'a [u64]),
}

macro_rules! on_keys {
    ($keys:expr, $s:ident => $body:expr) => {
        match $keys {
            Keys::I8($s) => $body,
            Keys::I16($s) => $body,
            Keys::I32($s) => $body,
            Keys::I64($s) => $body,
            Keys::U8($s) => $body,
            Keys::U16($s) => $body,
            Keys::U32($s) => $body,
            Keys::U64($s) => $body,
        }
    };
}

impl<'a> Keys<'a> {
    fn new(a: &'a dyn Array) -> Option<Self> {
        Some(match a.data_type() {
            DataType::Int8 => Keys::I8(a.as_primitive_opt::<Int8Type>()?.values()),
            DataType::Int16 => Keys::I16(a.as_primitive_opt::<Int16Type>()?.values()),
            DataType::Int32 => Keys::I32(a.as_primitive_opt::<Int32Type>()?.values()),
            DataType::Int64 => Keys::I64(a.as_primitive_opt::<Int64Type>()?.values()),
            DataType::UInt8 => Keys::U8(a.as_primitive_opt::<UInt8Type>()?.values()),
            DataType::UInt16 => Keys::U16(a.as_primitive_opt::<UInt16Type>()?.values()),
            DataType::UInt32 => Keys::U32(a.as_primitive_opt::<UInt32Type>()?.values()),
            DataType::UInt64 => Keys::U64(a.as_primitive_opt::<UInt64Type>()?.values()),
            _ => return None,
        })
    }

    /// The key of row `i` as an index (`None` past the end or when negative).
    // (One conversion for every key type: from the unsigned ones it cannot fail.)
    #[allow(clippy::unnecessary_fallible_conversions)]
    fn get(&self, i: usize) -> Option<usize> {
        on_keys!(self, s => s.get(i).and_then(|&k| usize::try_from(k).ok()))
    }

    /// The end of the run of rows from `i` (before `end`) with row `i`'s key.
    fn run_end(&self, i: usize, end: usize) -> usize {
        on_keys!(self, s => run_end_in(s, i, end))
    }
}

/// The end of the run of elements of `s` from `i` (before `end`) equal to
/// element `i`; `i + 1` when `i` is not before `end`.
fn run_end_in<T: PartialEq>(s: &[T], i: usize, end: usize) -> usize {
    let end = end.min(s.len());
    match s.get(i) {
        Some(x) if i < end => s[i + 1..end].iter().position(|y| y != x).map_or(end, |p| i + 1 + p),
        _ => i + 1,
    }
}

impl<'a> TextCol<'a> {
    pub(super) fn new(a: &'a dyn Array) -> Option<Self> {
        if let Some(dict) = a.as_any_dictionary_opt() {
            let values = StrCol::new(dict.values().as_ref())?;
            let keys = Keys::new(dict.keys())?;
            return Some(TextCol::Dict { keys, nulls: (a.null_count() > 0).then_some(a), values });
        }
        StrCol::new(a).map(TextCol::Plain)
    }

    /// The text of row `i`; `None` for null (and for a key outside the
    /// dictionary, which only a damaged file holds).
    pub(super) fn get(&self, i: usize) -> Option<&'a str> {
        match self {
            TextCol::Plain(s) => s.get(i),
            TextCol::Dict { keys, nulls, values } => {
                if nulls.is_some_and(|n| n.is_null(i)) {
                    return None;
                }
                keys.get(i).filter(|&k| k < values.len()).and_then(|k| values.get(k))
            }
        }
    }

    /// The end of the run of rows from `i` (before `end`) that certainly
    /// hold row `i`'s text (the same dictionary key, none of them null);
    /// `i + 1` when the texts must be compared.
    pub(super) fn run_end(&self, i: usize, end: usize) -> usize {
        match self {
            TextCol::Dict { keys, nulls, .. } => {
                let r = keys.run_end(i, end);
                match nulls {
                    None => r,
                    Some(n) => (i..r).position(|k| n.is_null(k)).map_or(r, |p| (i + p).max(i + 1)),
                }
            }
            TextCol::Plain(_) => i + 1,
        }
    }
}

/// A time column: timestamps of any unit (a zone makes them instants, no
/// zone local times), or integer epochs in the pipeline's unit.
pub(super) struct TimeCol<'a> {
    values: Ints<'a>,
    scale: Scale,
    /// The column has a null somewhere (checked per row only then).
    has_nulls: bool,
    /// The values are local wall-clock times.
    pub(super) local: bool,
    unit: &'static str,
}

enum Ints<'a> {
    I64(&'a [i64], &'a dyn Array),
    I32(&'a [i32], &'a dyn Array),
}

#[derive(Clone, Copy)]
enum Scale {
    Mul(i64),
    /// Floor division (nanoseconds to microseconds).
    Div(i64),
}

impl<'a> TimeCol<'a> {
    pub(super) fn new(a: &'a dyn Array, epoch: EpochUnit) -> Option<Self> {
        let (values, scale, unit) = match a.data_type() {
            DataType::Timestamp(TimeUnit::Second, _) => {
                (Ints::I64(a.as_primitive_opt::<TimestampSecondType>()?.values(), a), Scale::Mul(1_000_000), "s")
            }
            DataType::Timestamp(TimeUnit::Millisecond, _) => {
                (Ints::I64(a.as_primitive_opt::<TimestampMillisecondType>()?.values(), a), Scale::Mul(1_000), "ms")
            }
            DataType::Timestamp(TimeUnit::Microsecond, _) => {
                (Ints::I64(a.as_primitive_opt::<TimestampMicrosecondType>()?.values(), a), Scale::Mul(1), "us")
            }
            DataType::Timestamp(TimeUnit::Nanosecond, _) => {
                (Ints::I64(a.as_primitive_opt::<TimestampNanosecondType>()?.values(), a), Scale::Div(1_000), "ns")
            }
            DataType::Int64 => (Ints::I64(a.as_primitive_opt::<Int64Type>()?.values(), a), epoch_scale(epoch), "epoch"),
            DataType::Int32 => (Ints::I32(a.as_primitive_opt::<Int32Type>()?.values(), a), epoch_scale(epoch), "epoch"),
            _ => return None,
        };
        Some(TimeCol { values, scale, has_nulls: a.null_count() > 0, local: is_naive_timestamp(a.data_type()), unit })
    }

    /// Microseconds (UTC, or on the local clock when `local`); `Ok(None)`
    /// for null; `Err(raw text)` on overflow.
    pub(super) fn micros(&self, i: usize) -> Result<Option<i64>, String> {
        let (v, arr) = match self.values {
            Ints::I64(v, a) => (v.get(i).copied(), a),
            Ints::I32(v, a) => (v.get(i).map(|&x| i64::from(x)), a),
        };
        let Some(v) = v else { return Ok(None) };
        if self.has_nulls && arr.is_null(i) {
            return Ok(None);
        }
        match self.scale {
            Scale::Mul(f) => v.checked_mul(f).map(Some).ok_or_else(|| format!("{v} {}", self.unit)),
            Scale::Div(d) => Ok(Some(v.div_euclid(d))),
        }
    }
}

impl TimeCol<'_> {
    /// Appends rows `start..start + len` (as [`TimeCol::micros`]); `Err(k)`
    /// names the first row that is null or out of range (the caller asks
    /// `micros(k)` why). Columns without nulls in microseconds are copied whole.
    pub(super) fn extend_into(&self, out: &mut Vec<i64>, start: usize, len: usize) -> Result<(), usize> {
        if let (Ints::I64(v, _), Scale::Mul(1), false) = (&self.values, self.scale, self.has_nulls) {
            if let Some(slice) = v.get(start..start + len) {
                out.extend_from_slice(slice);
                return Ok(());
            }
        }
        out.reserve(len);
        for k in start..start + len {
            match self.micros(k) {
                Ok(Some(t)) => out.push(t),
                _ => return Err(k),
            }
        }
        Ok(())
    }
}

fn epoch_scale(unit: EpochUnit) -> Scale {
    match unit {
        EpochUnit::Seconds => Scale::Mul(1_000_000),
        EpochUnit::Milliseconds => Scale::Mul(1_000),
        EpochUnit::Microseconds => Scale::Mul(1),
        EpochUnit::Nanoseconds => Scale::Div(1_000),
    }
}

/// A numeric column read as f64.
pub(super) enum ValueCol<'a> {
    F64(&'a PrimitiveArray<Float64Type>),
    F32(&'a PrimitiveArray<Float32Type>),
    I64(&'a PrimitiveArray<Int64Type>),
    I32(&'a PrimitiveArray<Int32Type>),
    I16(&'a PrimitiveArray<Int16Type>),
    I8(&'a PrimitiveArray<Int8Type>),
    U64(&'a PrimitiveArray<UInt64Type>),
    U32(&'a PrimitiveArray<UInt32Type>),
    U16(&'a PrimitiveArray<UInt16Type>),
    U8(&'a PrimitiveArray<UInt8Type>),
    Bool(&'a BooleanArray),
}

impl<'a> ValueCol<'a> {
    pub(super) fn new(a: &'a dyn Array) -> Option<Self> {
        Some(match a.data_type() {
            DataType::Float64 => ValueCol::F64(a.as_primitive_opt()?),
            DataType::Float32 => ValueCol::F32(a.as_primitive_opt()?),
            DataType::Int64 => ValueCol::I64(a.as_primitive_opt()?),
            DataType::Int32 => ValueCol::I32(a.as_primitive_opt()?),
            DataType::Int16 => ValueCol::I16(a.as_primitive_opt()?),
            DataType::Int8 => ValueCol::I8(a.as_primitive_opt()?),
            DataType::UInt64 => ValueCol::U64(a.as_primitive_opt()?),
            DataType::UInt32 => ValueCol::U32(a.as_primitive_opt()?),
            DataType::UInt16 => ValueCol::U16(a.as_primitive_opt()?),
            DataType::UInt8 => ValueCol::U8(a.as_primitive_opt()?),
            DataType::Boolean => ValueCol::Bool(a.as_boolean_opt()?),
            _ => return None,
        })
    }

    /// The value as f64; `None` for null. Integers beyond 2^53 lose their
    /// last digits, as any f64 would.
    pub(super) fn get(&self, i: usize) -> Option<f64> {
        macro_rules! prim {
            ($a:expr) => {
                (i < $a.len() && !$a.is_null(i)).then(|| $a.value(i) as f64)
            };
        }
        match self {
            ValueCol::F64(a) => prim!(a),
            ValueCol::F32(a) => (i < a.len() && !a.is_null(i)).then(|| f64::from(a.value(i))),
            ValueCol::I64(a) => prim!(a),
            ValueCol::I32(a) => prim!(a),
            ValueCol::I16(a) => prim!(a),
            ValueCol::I8(a) => prim!(a),
            ValueCol::U64(a) => prim!(a),
            ValueCol::U32(a) => prim!(a),
            ValueCol::U16(a) => prim!(a),
            ValueCol::U8(a) => prim!(a),
            ValueCol::Bool(a) => (i < a.len() && !a.is_null(i)).then(|| if a.value(i) { 1.0 } else { 0.0 }),
        }
    }
}

impl ValueCol<'_> {
    /// Appends rows `start..start + len` as f64, NaN for null. A Float64
    /// column without nulls is copied whole.
    pub(super) fn extend_into(&self, out: &mut Vec<f64>, start: usize, len: usize) {
        if let ValueCol::F64(a) = self {
            if a.null_count() == 0 {
                if let Some(slice) = a.values().get(start..start + len) {
                    out.extend_from_slice(slice);
                    return;
                }
            }
        }
        out.extend((start..start + len).map(|k| self.get(k).unwrap_or(f64::NAN)));
    }
}

/// A quality column: integer codes or text.
pub(super) enum QualCol<'a> {
    Int(IntCol<'a>),
    Text(TextCol<'a>),
}

impl<'a> QualCol<'a> {
    pub(super) fn new(a: &'a dyn Array) -> Option<Self> {
        if is_integer(a.data_type()) {
            return IntCol::new(a).map(QualCol::Int);
        }
        TextCol::new(a).map(QualCol::Text)
    }

    pub(super) fn get(&self, i: usize) -> RawQuality<'a> {
        match self {
            QualCol::Int(c) => c.get(i).map_or(RawQuality::Null, RawQuality::Int),
            QualCol::Text(c) => c.get(i).map_or(RawQuality::Null, RawQuality::Text),
        }
    }

    /// The end of the run of rows from `i` (before `end`) that certainly
    /// hold row `i`'s code (at least `i + 1`).
    pub(super) fn run_end(&self, i: usize, end: usize) -> usize {
        match self {
            QualCol::Int(c) => c.run_end(i, end),
            QualCol::Text(c) => c.run_end(i, end),
        }
    }
}

/// An integer column read as i64 (u64 beyond i64::MAX saturates; such a
/// code is out of range for every coding anyway).
pub(super) enum IntCol<'a> {
    I64(&'a PrimitiveArray<Int64Type>),
    I32(&'a PrimitiveArray<Int32Type>),
    I16(&'a PrimitiveArray<Int16Type>),
    I8(&'a PrimitiveArray<Int8Type>),
    U64(&'a PrimitiveArray<UInt64Type>),
    U32(&'a PrimitiveArray<UInt32Type>),
    U16(&'a PrimitiveArray<UInt16Type>),
    U8(&'a PrimitiveArray<UInt8Type>),
}

impl<'a> IntCol<'a> {
    pub(super) fn new(a: &'a dyn Array) -> Option<Self> {
        Some(match a.data_type() {
            DataType::Int64 => IntCol::I64(a.as_primitive_opt()?),
            DataType::Int32 => IntCol::I32(a.as_primitive_opt()?),
            DataType::Int16 => IntCol::I16(a.as_primitive_opt()?),
            DataType::Int8 => IntCol::I8(a.as_primitive_opt()?),
            DataType::UInt64 => IntCol::U64(a.as_primitive_opt()?),
            DataType::UInt32 => IntCol::U32(a.as_primitive_opt()?),
            DataType::UInt16 => IntCol::U16(a.as_primitive_opt()?),
            DataType::UInt8 => IntCol::U8(a.as_primitive_opt()?),
            _ => return None,
        })
    }

    pub(super) fn get(&self, i: usize) -> Option<i64> {
        macro_rules! prim {
            ($a:expr) => {
                (i < $a.len() && !$a.is_null(i)).then(|| i64::from($a.value(i)))
            };
        }
        match self {
            IntCol::I64(a) => prim!(a),
            IntCol::I32(a) => prim!(a),
            IntCol::I16(a) => prim!(a),
            IntCol::I8(a) => prim!(a),
            IntCol::U64(a) => (i < a.len() && !a.is_null(i)).then(|| i64::try_from(a.value(i)).unwrap_or(i64::MAX)),
            IntCol::U32(a) => prim!(a),
            IntCol::U16(a) => prim!(a),
            IntCol::U8(a) => prim!(a),
        }
    }

    /// The end of the run of rows from `i` (before `end`) with row `i`'s
    /// value, none of them null (`i + 1` when the column has nulls).
    pub(super) fn run_end(&self, i: usize, end: usize) -> usize {
        macro_rules! run {
            ($a:expr) => {
                if $a.null_count() == 0 {
                    run_end_in($a.values(), i, end)
                } else {
                    i + 1
                }
            };
        }
        match self {
            IntCol::I64(a) => run!(a),
            IntCol::I32(a) => run!(a),
            IntCol::I16(a) => run!(a),
            IntCol::I8(a) => run!(a),
            IntCol::U64(a) => run!(a),
            IntCol::U32(a) => run!(a),
            IntCol::U16(a) => run!(a),
            IntCol::U8(a) => run!(a),
        }
    }

    /// A code no column of this type can exceed, when the type bounds it
    /// to the OPC byte range (so `auto` need not scan the column).
    pub(super) fn type_max(t: &DataType) -> Option<i64> {
        match t {
            DataType::UInt8 => Some(255),
            DataType::Int8 => Some(127),
            _ => None,
        }
    }
}
