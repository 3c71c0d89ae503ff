//! Quality codes to quality classes ([`Quality`]).
//!
//! - Classic OPC quality byte (0-255): bits 7-6 = `11` good (192-255), `01`
//!   uncertain (64-127), `00` bad (0-63). `10` (128-191) is not used by the
//!   classic coding and is read as bad.
//! - OPC UA StatusCode (32-bit unsigned): the top two bits = `00` good, `01`
//!   uncertain, `10` or `11` bad.
//! - Words, compared case-insensitively after trimming spaces. Default
//!   words (for `auto`): good `good`, `ok`; uncertain `uncertain`,
//!   `questionable`, `suspect`; bad `bad`, `error`, `fault`. A pipeline's
//!   own lists (`text`) replace the defaults entirely: only the words listed
//!   are known (a word in two lists would count as the worse class; the
//!   pipeline check rejects that anyway).
//! - `auto`: an integer column is read as the OPC byte when every code in
//!   the file is at most 255 and as OPC UA otherwise (decided per file); a
//!   text column is read as words.
//!
//! A negative code, an OPC byte above 255, an OPC UA code above
//! 4 294 967 295 and an unknown word are errors naming the row and the value.
//! An empty (null) quality cell is read as bad.

use crate::pipeline::QualityCoding;
use crate::series::Quality;

/// Default words of each class.
pub(super) const DEFAULT_GOOD: [&str; 2] = ["good", "ok"];
pub(super) const DEFAULT_UNCERTAIN: [&str; 3] = ["uncertain", "questionable", "suspect"];
pub(super) const DEFAULT_BAD: [&str; 3] = ["bad", "error", "fault"];

/// The mapping in force for one quality column of one file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(super) enum QualityMap {
    /// Classic OPC quality byte.
    OpcByte,
    /// OPC UA StatusCode.
    OpcUa,
    /// Lower-case words and their classes.
    Words(Vec<(String, Quality)>),
}

/// A raw quality cell.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum RawQuality<'a> {
    Null,
    Int(i64),
    Text(&'a str),
}

impl QualityMap {
    /// The mapping for an integer column whose codes reach `max` (`None`:
    /// not known; only `auto` needs it). `Err` when the pipeline asks for
    /// words.
    pub(super) fn for_integers(coding: &QualityCoding, max: Option<i64>) -> Result<QualityMap, &'static str> {
        match coding {
            QualityCoding::Auto => {
                Ok(if max.is_some_and(|m| m > 255) { QualityMap::OpcUa } else { QualityMap::OpcByte })
            }
            QualityCoding::OpcByte => Ok(QualityMap::OpcByte),
            QualityCoding::OpcUa => Ok(QualityMap::OpcUa),
            QualityCoding::Text { .. } => {
                Err("the pipeline reads quality as words (`text`), but the quality column holds integers")
            }
        }
    }

    /// The mapping for a text column: words for `auto` and `text`; for the
    /// numeric codings each cell must hold a whole number.
    pub(super) fn for_text(coding: &QualityCoding) -> QualityMap {
        match coding {
            QualityCoding::Auto => {
                let own = |w: &[&str]| w.iter().map(|s| s.to_string()).collect::<Vec<_>>();
                QualityMap::words(&own(&DEFAULT_GOOD), &own(&DEFAULT_UNCERTAIN), &own(&DEFAULT_BAD))
            }
            QualityCoding::OpcByte => QualityMap::OpcByte,
            QualityCoding::OpcUa => QualityMap::OpcUa,
            QualityCoding::Text { good, uncertain, bad } => QualityMap::words(good, uncertain, bad),
        }
    }

    fn words(good: &[String], uncertain: &[String], bad: &[String]) -> QualityMap {
        let mut v: Vec<(String, Quality)> = Vec::new();
        for (list, q) in [(good, Quality::Good), (uncertain, Quality::Uncertain), (bad, Quality::Bad)] {
            for w in list.iter().map(|s| s.trim().to_lowercase()).filter(|w| !w.is_empty()) {
                match v.iter_mut().find(|(x, _)| *x == w) {
                    Some(e) => e.1 = e.1.max(q),
                    None => v.push((w, q)),
                }
            }
        }
        QualityMap::Words(v)
    }

    /// The class of one cell; `Err(reason)` naming the value.
    pub(super) fn map(&self, raw: RawQuality) -> Result<Quality, String> {
        match raw {
            RawQuality::Null => Ok(Quality::Bad),
            RawQuality::Int(v) => self.code(v),
            RawQuality::Text(s) => self.text(s),
        }
    }

    fn code(&self, v: i64) -> Result<Quality, String> {
        match self {
            QualityMap::OpcByte => opc_byte(v),
            QualityMap::OpcUa => opc_ua(v),
            QualityMap::Words(_) => Err(format!("quality `{v}` is a number, but the quality column is read as words")),
        }
    }

    fn text(&self, s: &str) -> Result<Quality, String> {
        let t = s.trim();
        if t.is_empty() {
            return Ok(Quality::Bad);
        }
        match self {
            QualityMap::Words(words) => {
                let found = if t.is_ascii() {
                    words.iter().find(|(w, _)| w.eq_ignore_ascii_case(t))
                } else {
                    let lower = t.to_lowercase();
                    words.iter().find(|(w, _)| *w == lower)
                };
                found.map(|(_, q)| *q).ok_or_else(|| {
                    let list = |q: Quality| {
                        let l: Vec<&str> = words.iter().filter(|(_, c)| *c == q).map(|(w, _)| w.as_str()).collect();
                        if l.is_empty() {
                            "none".to_string()
                        } else {
                            l.join(", ")
                        }
                    };
                    format!(
                        "quality `{t}` is not a known word (good: {}; uncertain: {}; bad: {})",
                        list(Quality::Good),
                        list(Quality::Uncertain),
                        list(Quality::Bad)
                    )
                })
            }
            _ => match t.parse::<i64>() {
                Ok(v) => self.code(v),
                Err(_) => Err(format!("quality `{t}` is not a whole-number code")),
            },
        }
    }
}

/// Classic OPC quality byte.
pub(super) fn opc_byte(v: i64) -> Result<Quality, String> {
    if v < 0 {
        return Err(format!("quality code {v} is negative"));
    }
    if v > 255 {
        return Err(format!("quality code {v} is not an OPC quality byte (0-255)"));
    }
    Ok(match (v >> 6) & 0b11 {
        0b11 => Quality::Good,
        0b01 => Quality::Uncertain,
        // 00 bad; 10 is not used by the classic coding: read as bad.
        _ => Quality::Bad,
    })
}

/// OPC UA StatusCode.
pub(super) fn opc_ua(v: i64) -> Result<Quality, String> {
    if v < 0 {
        return Err(format!(
            "quality code {v} is negative (OPC UA status codes are unsigned 32-bit; store them as UInt32 or Int64)"
        ));
    }
    if v > i64::from(u32::MAX) {
        return Err(format!("quality code {v} is not an OPC UA status code (at most 4294967295)"));
    }
    Ok(match (v >> 30) & 0b11 {
        0b00 => Quality::Good,
        0b01 => Quality::Uncertain,
        _ => Quality::Bad,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn opc_byte_bits() {
        let q = |v| opc_byte(v).unwrap();
        assert_eq!([0, 63, 64, 127, 128, 191, 192, 255].map(q), {
            use Quality::*;
            [Bad, Bad, Uncertain, Uncertain, Bad, Bad, Good, Good]
        });
        assert!(opc_byte(-1).unwrap_err().contains("negative"));
        assert!(opc_byte(256).unwrap_err().contains("0-255"));
    }

    #[test]
    fn opc_ua_top_bits() {
        let q = |v| opc_ua(v).unwrap();
        assert_eq!(q(0), Quality::Good);
        assert_eq!(q(0x3FFF_FFFF), Quality::Good);
        assert_eq!(q(0x4000_0000), Quality::Uncertain);
        assert_eq!(q(0x408F_0000), Quality::Uncertain);
        assert_eq!(q(0x8000_0000), Quality::Bad);
        assert_eq!(q(0xC000_0000), Quality::Bad);
        assert_eq!(q(0xFFFF_FFFF), Quality::Bad);
        assert!(opc_ua(-2_147_483_648).unwrap_err().contains("negative"));
        assert!(opc_ua(1 << 32).is_err());
    }

    #[test]
    fn auto_picks_by_the_file_maximum() {
        let a = QualityCoding::Auto;
        assert_eq!(QualityMap::for_integers(&a, Some(255)).unwrap(), QualityMap::OpcByte);
        assert_eq!(QualityMap::for_integers(&a, None).unwrap(), QualityMap::OpcByte);
        assert_eq!(QualityMap::for_integers(&a, Some(256)).unwrap(), QualityMap::OpcUa);
        assert!(QualityMap::for_integers(&QualityCoding::Text { good: vec![], uncertain: vec![], bad: vec![] }, None)
            .is_err());
    }

    #[test]
    fn words_default_and_custom() {
        let m = QualityMap::for_text(&QualityCoding::Auto);
        let q = |s| m.map(RawQuality::Text(s));
        assert_eq!(q("GOOD").unwrap(), Quality::Good);
        assert_eq!(q(" ok ").unwrap(), Quality::Good);
        assert_eq!(q("Questionable").unwrap(), Quality::Uncertain);
        assert_eq!(q("suspect").unwrap(), Quality::Uncertain);
        assert_eq!(q("Fault").unwrap(), Quality::Bad);
        assert_eq!(q("").unwrap(), Quality::Bad);
        let e = q("maybe").unwrap_err();
        assert!(e.contains("quality `maybe` is not a known word (good: good, ok; uncertain:"), "{e}");
        let m = QualityMap::for_text(&QualityCoding::Text {
            good: vec!["Valid".into(), "Prüfung".into()],
            uncertain: vec![],
            bad: vec!["INVALID".into(), "valid".into()],
        });
        assert_eq!(m.map(RawQuality::Text("PRÜFUNG")).unwrap(), Quality::Good);
        assert_eq!(m.map(RawQuality::Text("valid")).unwrap(), Quality::Bad, "the worse class wins");
        assert!(m.map(RawQuality::Text("uncertain")).is_err(), "own lists replace the defaults");
        assert!(m.map(RawQuality::Text("good")).is_err(), "own lists replace the defaults");
        let e = m.map(RawQuality::Text("ok")).unwrap_err();
        assert!(
            e.contains("quality `ok` is not a known word (good: prüfung; uncertain: none; bad: valid, invalid)"),
            "{e}"
        );
        assert!(m.map(RawQuality::Int(192)).unwrap_err().contains("read as words"));
    }

    #[test]
    fn numeric_codings_from_text() {
        let m = QualityMap::for_text(&QualityCoding::OpcByte);
        assert_eq!(m.map(RawQuality::Text("192")).unwrap(), Quality::Good);
        assert!(m.map(RawQuality::Text("good")).unwrap_err().contains("not a whole-number code"));
        assert!(m.map(RawQuality::Text("-3")).unwrap_err().contains("negative"));
        assert_eq!(m.map(RawQuality::Null).unwrap(), Quality::Bad);
    }
}
