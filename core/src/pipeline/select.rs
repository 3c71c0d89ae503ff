//! Tag selection: which rules select a tag ([`TagSelector`]), what the tag's
//! settings and chain of steps become ([`PipelineSpec::resolve`]), and the
//! report of `tagwright check --input` ([`PipelineSpec::selection_report`]).
//!
//! Rules apply in file order. Every rule that selects a tag overrides the
//! settings it sets; the tag's chain is the `steps` of the last selecting rule
//! that has `steps`. A tag that no rule selects, or whose chain is empty, is
//! not processed.

use std::fmt::Write as _;

use super::spec::{PartialSettings, PipelineSpec, ResolvedTag, StepSpec, TagSelector};
use crate::plugin::TagSettings;

impl TagSelector {
    /// A selector of the given names and patterns, each checked with
    /// [`check_pattern`]; `Err` names the first bad one.
    pub fn new(patterns: Vec<String>) -> Result<TagSelector, String> {
        if patterns.is_empty() {
            return Err("no tag name or pattern given".into());
        }
        for p in &patterns {
            check_pattern(p)?;
        }
        Ok(TagSelector { patterns })
    }

    /// True if `tag` equals one of the names or matches one of the patterns.
    /// Matching is case-sensitive and covers the whole tag name.
    pub fn matches(&self, tag: &str) -> bool {
        self.patterns.iter().any(|p| glob_match(p, tag))
    }
}

/// Checks a tag name or glob pattern: `*` matches any run of characters
/// (also none), `?` one character, `[...]` one character of a class (`[AB]`,
/// ranges `[0-9]`, negation `[!AB]` or `[^AB]`; a `]` right after the opening
/// bracket, or after `!`/`^`, stands for itself). Any other character matches
/// itself; `[*]`, `[?]` and `[[]` match the literal character.
pub fn check_pattern(pattern: &str) -> Result<(), String> {
    if pattern.is_empty() {
        return Err("empty tag name or pattern".into());
    }
    if pattern.trim() != pattern {
        return Err(format!("`{pattern}` starts or ends with a space; tag names are compared exactly"));
    }
    let p: Vec<char> = pattern.chars().collect();
    let mut i = 0;
    while i < p.len() {
        if p[i] == '[' {
            let class = parse_class(&p, i).ok_or_else(|| {
                format!("`{pattern}`: `[` at character {} opens a class that is never closed with `]`", i + 1)
            })?;
            if let Some((lo, hi)) = class.ranges.iter().find(|(lo, hi)| lo > hi) {
                return Err(format!("`{pattern}`: range `{lo}-{hi}` runs backwards"));
            }
            i = class.end;
        } else {
            i += 1;
        }
    }
    Ok(())
}

/// A parsed `[...]` class.
struct Class {
    negated: bool,
    ranges: Vec<(char, char)>,
    /// Index just past the closing `]`.
    end: usize,
}

impl Class {
    fn contains(&self, c: char) -> bool {
        self.ranges.iter().any(|&(lo, hi)| lo <= c && c <= hi) != self.negated
    }
}

/// Parses the class opening at `p[start] == '['`; `None` if never closed.
fn parse_class(p: &[char], start: usize) -> Option<Class> {
    let mut i = start + 1;
    let negated = matches!(p.get(i), Some('!' | '^'));
    if negated {
        i += 1;
    }
    let first = i;
    let mut ranges = Vec::new();
    loop {
        let c = *p.get(i)?;
        if c == ']' && i > first {
            return Some(Class { negated, ranges, end: i + 1 });
        }
        match (p.get(i + 1), p.get(i + 2)) {
            (Some('-'), Some(&hi)) if hi != ']' => {
                ranges.push((c, hi));
                i += 3;
            }
            _ => {
                ranges.push((c, c));
                i += 1;
            }
        }
    }
}

/// Whole-string glob match (see [`check_pattern`]); an unclosed `[` matches
/// itself. Backtracks only to the last `*`, so the cost is
/// O(len(pattern) * len(tag)).
fn glob_match(pattern: &str, text: &str) -> bool {
    if !pattern.contains(['*', '?', '[']) {
        return pattern == text;
    }
    let p: Vec<char> = pattern.chars().collect();
    let t: Vec<char> = text.chars().collect();
    let (mut pi, mut ti) = (0, 0);
    // After a `*`: the pattern index behind it and the text index it resumes from.
    let mut star: Option<(usize, usize)> = None;
    while ti < t.len() {
        let step = match p.get(pi) {
            Some('*') => {
                star = Some((pi + 1, ti));
                pi += 1;
                continue;
            }
            Some('?') => Some(pi + 1),
            Some('[') => match parse_class(&p, pi) {
                Some(class) => class.contains(t[ti]).then_some(class.end),
                None => (t[ti] == '[').then_some(pi + 1),
            },
            Some(&c) => (c == t[ti]).then_some(pi + 1),
            None => None,
        };
        match (step, star) {
            (Some(next), _) => {
                pi = next;
                ti += 1;
            }
            (None, Some((sp, st))) => {
                pi = sp;
                ti = st + 1;
                star = Some((sp, st + 1));
            }
            (None, None) => return false,
        }
    }
    p[pi..].iter().all(|&c| c == '*')
}

impl PartialSettings {
    /// Overwrites the fields of `settings` that this rule (or the defaults) sets.
    pub fn apply_to(&self, settings: &mut TagSettings) {
        if let Some(u) = &self.units {
            settings.units = Some(u.clone());
        }
        if let Some(r) = self.range {
            settings.range = Some(r);
        }
        if let Some(m) = &self.model {
            settings.model = Some(m.clone());
        }
        if let Some(p) = self.period_us {
            settings.period_us = Some(p);
        }
        if let Some(s) = self.sampling {
            settings.sampling = s;
        }
        if let Some(f) = self.uncertain_factor {
            settings.uncertain_factor = f;
        }
        if let Some(g) = &self.group {
            settings.group = Some(g.id.clone());
            settings.group_trusted = g.trusted.clone();
        }
    }
}

impl PipelineSpec {
    /// The settings and chain of steps of `tag`: [`TagSettings::default`],
    /// then `defaults`, then every selecting rule in order. `None` when no
    /// rule selects the tag or its chain is empty (the tag is not processed).
    pub fn resolve(&self, tag: &str) -> Option<ResolvedTag> {
        let mut settings = TagSettings::default();
        self.defaults.apply_to(&mut settings);
        let mut group = self.defaults.group.clone();
        let mut steps: Option<&Vec<StepSpec>> = None;
        let mut rules = Vec::new();
        for (i, rule) in self.rules.iter().enumerate().filter(|(_, r)| r.tags.matches(tag)) {
            rules.push(i);
            rule.settings.apply_to(&mut settings);
            if let Some(g) = &rule.settings.group {
                group = Some(g.clone());
            }
            if let Some(s) = &rule.steps {
                steps = Some(s);
            }
        }
        let steps = steps.filter(|s| !s.is_empty())?.clone();
        Some(ResolvedTag { settings, steps, rules, group })
    }

    /// For `tagwright check --input`: for each rule the tags it selects (count
    /// and up to ten names), then the tags selected but left without steps and
    /// the tags no rule selects, in the order of `tags`.
    pub fn selection_report(&self, tags: &[String]) -> String {
        const SHOWN: usize = 10;
        let list = |names: &[&str]| -> String {
            let mut s = names.iter().take(SHOWN).copied().collect::<Vec<_>>().join(", ");
            if names.len() > SHOWN {
                let _ = write!(s, ", ... and {} more", names.len() - SHOWN);
            }
            s
        };
        let count = |n: usize| if n == 1 { "1 tag".to_string() } else { format!("{n} tags") };
        let mut out = String::new();
        for (i, rule) in self.rules.iter().enumerate() {
            let selected: Vec<&str> = tags.iter().map(String::as_str).filter(|t| rule.tags.matches(t)).collect();
            let _ = write!(
                out,
                "rule {} (line {}, tags {}): {}",
                i + 1,
                rule.line,
                rule.tags.patterns.join(", "),
                count(selected.len())
            );
            if !selected.is_empty() {
                let _ = write!(out, ": {}", list(&selected));
            }
            out.push('\n');
        }
        let mut unselected = Vec::new();
        let mut no_steps = Vec::new();
        for t in tags {
            if !self.rules.iter().any(|r| r.tags.matches(t)) {
                unselected.push(t.as_str());
            } else if self.resolve(t).is_none() {
                no_steps.push(t.as_str());
            }
        }
        let processed = tags.len() - unselected.len() - no_steps.len();
        for (what, names) in [("selected, but without steps", &no_steps), ("selected by no rule", &unselected)] {
            if !names.is_empty() {
                let _ = writeln!(out, "{what} (not processed): {}: {}", count(names.len()), list(names));
            }
        }
        let _ = writeln!(out, "{processed} of {} will be processed", count(tags.len()));
        out
    }
}

#[cfg(test)]
mod tests {
    use std::path::Path;

    use super::*;
    use crate::plugin::Registry;
    use crate::series::Sampling;

    const LAYERED: &str = r#"version: 1
defaults:
  model: local-level
  uncertain_factor: 3
  period: 10s
rules:
  - tags: "FT-*.PV"
    units: m3/h
    range: [0, 400]
    period: 5s
    steps: [quality, range]
  - tags: FT-101.PV
    range: [0, 250]
    model: local-level+arma(1,0)
  - tags: ["FT-1[0-9][0-9].PV", TT-2204A.PV]
    sampling: {exception: {deadband: 0.5}}
    group: {kind: redundant, name: header, trusted: TT-2204A.PV}
    steps: [quality]
  - tags: FT-199.PV
    steps: []
  - tags: TT-*
    units: degC
"#;

    fn layered() -> PipelineSpec {
        PipelineSpec::parse(LAYERED, Path::new("layered.yaml"), &Registry::with_builtins()).unwrap()
    }

    fn sel(p: &[&str]) -> TagSelector {
        TagSelector::new(p.iter().map(|s| s.to_string()).collect()).unwrap()
    }

    #[test]
    fn exact_names_and_globs() {
        let s = sel(&["FT-*.PV", "TT-2204[AB].PV", "PT-10?.PV"]);
        for yes in ["FT-101.PV", "FT-.PV", "TT-2204A.PV", "TT-2204B.PV", "PT-101.PV"] {
            assert!(s.matches(yes), "{yes}");
        }
        for no in ["FT-101.SP", "ft-101.PV", "TT-2204C.PV", "PT-1001.PV", "PT-10.PV", "XFT-101.PV"] {
            assert!(!s.matches(no), "{no}");
        }
        assert!(sel(&["FT-101.PV"]).matches("FT-101.PV"));
        assert!(!sel(&["FT-101.PV"]).matches("FT-101.PVX"));
    }

    #[test]
    fn glob_classes_and_stars() {
        assert!(glob_match("*", ""));
        assert!(glob_match("**", "abc"));
        assert!(glob_match("a*b*c", "aXXbYYbc"));
        assert!(!glob_match("a*b*c", "aXXbYYbd"));
        assert!(glob_match("[0-9][!A-Z]", "5x"));
        assert!(!glob_match("[0-9][!A-Z]", "5X"));
        assert!(glob_match("[^A]", "B"));
        assert!(glob_match("[]]", "]"));
        assert!(glob_match("[!]]", "a"));
        assert!(glob_match("[-a]", "-"));
        assert!(glob_match("[a-]", "-"));
        assert!(glob_match("[*]", "*"));
        assert!(!glob_match("[*]", "x"));
        assert!(glob_match("TT-?.PV", "TT-é.PV"));
        // An unchecked unclosed class matches a literal `[`.
        assert!(glob_match("a[b", "a[b"));
    }

    #[test]
    fn bad_patterns() {
        assert!(check_pattern("FT-[12").unwrap_err().contains("never closed"));
        assert!(check_pattern("FT-[]").unwrap_err().contains("never closed"));
        assert!(check_pattern("FT-[9-0]").unwrap_err().contains("runs backwards"));
        assert!(check_pattern("").is_err());
        assert!(check_pattern(" FT-1").unwrap_err().contains("space"));
        assert!(TagSelector::new(vec![]).is_err());
        check_pattern("FT-[!0-9]*.PV").unwrap();
    }

    #[test]
    fn later_rules_override_the_settings_they_set() {
        let spec = layered();
        let ft = spec.resolve("FT-101.PV").unwrap();
        assert_eq!(ft.rules, [0, 1, 2]);
        let s = &ft.settings;
        assert_eq!(s.units.as_deref(), Some("m3/h"));
        assert_eq!(s.range, Some((0.0, 250.0)));
        assert_eq!(s.period_us, Some(5_000_000));
        assert_eq!(s.model.as_ref().map(|m| m.to_string()).as_deref(), Some("local-level+arma(1,0)"));
        assert_eq!(s.uncertain_factor, 3.0);
        assert_eq!(s.sampling, Sampling::Exception { deadband: 0.5 });
        assert_eq!(s.group.as_deref(), Some("header"));
        assert_eq!(s.group_trusted.as_deref(), Some("TT-2204A.PV"));
        assert_eq!(ft.group.as_ref().map(|g| g.id.as_str()), Some("header"));
        // The chain is the last selecting rule's with steps.
        assert_eq!(ft.steps.iter().map(|s| s.name.as_str()).collect::<Vec<_>>(), ["quality"]);

        let other = spec.resolve("FT-7.PV").unwrap();
        assert_eq!(other.rules, [0]);
        assert_eq!(other.settings.range, Some((0.0, 400.0)));
        assert_eq!(other.settings.model.as_ref().map(|m| m.to_string()).as_deref(), Some("local-level"));
        assert_eq!(other.settings.sampling, Sampling::Regular);
        assert_eq!(other.steps.len(), 2);
        assert!(other.group.is_none() && other.settings.group.is_none());
    }

    #[test]
    fn unselected_or_stepless_tags_are_not_processed() {
        let spec = layered();
        // Selected, but the last rule with steps says `steps: []`.
        assert!(spec.resolve("FT-199.PV").is_none());
        // Selected only by rules without steps.
        assert!(spec.resolve("TT-2204B.PV").is_none());
        // Selected by no rule.
        assert!(spec.resolve("PT-310.PV").is_none());
        // A rule without steps still changes the settings of a tag that has a chain.
        let tt = spec.resolve("TT-2204A.PV").unwrap();
        assert_eq!(tt.rules, [2, 4]);
        assert_eq!(tt.settings.units.as_deref(), Some("degC"));
        assert_eq!(tt.settings.period_us, Some(10_000_000));
    }

    #[test]
    fn group_id_defaults_to_the_rule_number() {
        let text = "version: 1\nrules:\n  - {tags: a, steps: [quality]}\n  - {tags: [a, b], group: redundant}\n";
        let spec = PipelineSpec::parse(text, Path::new("g.yaml"), &Registry::with_builtins()).unwrap();
        let a = spec.resolve("a").unwrap();
        assert_eq!(a.settings.group.as_deref(), Some("rule2"));
        assert_eq!(a.group.unwrap().kind, crate::pipeline::GroupKind::Redundant);
    }

    #[test]
    fn selection_report_lists_each_rule_and_the_leftovers() {
        let spec = layered();
        let mut tags: Vec<String> = (100..115).map(|i| format!("FT-{i}.PV")).collect();
        tags.extend(["FT-199.PV", "TT-2204A.PV", "TT-2204B.PV", "PT-310.PV"].map(String::from));
        let r = spec.selection_report(&tags);
        let lines: Vec<&str> = r.lines().collect();
        assert_eq!(
            lines[0],
            "rule 1 (line 7, tags FT-*.PV): 16 tags: FT-100.PV, FT-101.PV, FT-102.PV, FT-103.PV, FT-104.PV, \
             FT-105.PV, FT-106.PV, FT-107.PV, FT-108.PV, FT-109.PV, ... and 6 more"
        );
        assert_eq!(lines[1], "rule 2 (line 12, tags FT-101.PV): 1 tag: FT-101.PV");
        assert!(lines[2].starts_with("rule 3 (line 15, tags FT-1[0-9][0-9].PV, TT-2204A.PV): 17 tags: "), "{r}");
        assert_eq!(lines[3], "rule 4 (line 19, tags FT-199.PV): 1 tag: FT-199.PV");
        assert_eq!(lines[4], "rule 5 (line 21, tags TT-*): 2 tags: TT-2204A.PV, TT-2204B.PV");
        assert_eq!(lines[5], "selected, but without steps (not processed): 2 tags: FT-199.PV, TT-2204B.PV");
        assert_eq!(lines[6], "selected by no rule (not processed): 1 tag: PT-310.PV");
        assert_eq!(lines[7], "16 of 19 tags will be processed");
        assert_eq!(lines.len(), 8);
    }
}
