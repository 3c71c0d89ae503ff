use std::collections::BTreeSet;
use std::sync::OnceLock;

use super::*;
use crate::series::Fault;

/// The default scenario, generated once for all tests.
fn demo() -> &'static DemoData {
    static DATA: OnceLock<DemoData> = OnceLock::new();
    DATA.get_or_init(|| generate(&DemoOptions::default()))
}

#[test]
fn same_seed_gives_identical_files_and_another_seed_does_not() {
    let dir = tempfile::tempdir().unwrap();
    let a = generate(&DemoOptions { hours: 2.0, ..DemoOptions::default() });
    let b = generate(&DemoOptions { hours: 2.0, ..DemoOptions::default() });
    let c = generate(&DemoOptions { hours: 2.0, seed: 2, ..DemoOptions::default() });
    assert_eq!(a, b);
    let write = |d: &DemoData, name: &str| {
        let sub = dir.path().join(name);
        // The export goes to an existing directory; a missing one is an error, not a panic.
        write_export(d, &sub.join("export.parquet")).unwrap_err();
        std::fs::create_dir_all(&sub).unwrap();
        write_export(d, &sub.join("export.parquet")).unwrap();
        write_truth(d, &sub.join("truth")).unwrap();
        ["export.parquet", "truth/truth_values.parquet", "truth/truth_events.json"]
            .map(|f| std::fs::read(sub.join(f)).unwrap())
    };
    let (fa, fb, fc) = (write(&a, "a"), write(&b, "b"), write(&c, "c"));
    assert_eq!(fa, fb);
    for i in 0..3 {
        assert_ne!(fa[i], fc[i], "file {i} does not depend on the seed");
    }
    // No temporary file is left behind.
    let left: Vec<_> = std::fs::read_dir(dir.path().join("a")).unwrap().map(|e| e.unwrap().file_name()).collect();
    assert_eq!(left.len(), 2, "{left:?}");
}

#[test]
fn a_tag_does_not_depend_on_the_other_tags() {
    // Streams are per tag and purpose: the truth of a tag is fixed by the seed and its name.
    let d = demo();
    let mut rng = stream(1, "TT-3102.PV", PROCESS);
    let def = catalogue::all().find(|d| d.name == "TT-3102.PV").unwrap();
    let tl = Timeline { feed: vec![], trip: (0, 0) };
    let op = process::operating_point(def, &tl, d.start_us, 5_000_000, 5760);
    let truth = process::truth(def, &op, 5_000_000, &mut rng);
    let got: Vec<f64> = d.truth_of("TT-3102.PV").iter().map(|t| t.value).collect();
    assert_eq!(got, truth);
}

#[test]
fn catalogue_is_about_sixty_unique_isa_tags() {
    let d = demo();
    assert!((55..=65).contains(&d.tags.len()), "{} tags", d.tags.len());
    let names: BTreeSet<_> = d.tags.iter().map(|t| t.name).collect();
    assert_eq!(names.len(), d.tags.len(), "duplicate tag names");
    assert!(d.tags.windows(2).all(|w| w[0].name < w[1].name), "catalogue not sorted");
    for t in &d.tags {
        let (func, rest) = t.name.split_once('-').unwrap();
        assert!(["FT", "TT", "PT", "LT", "AT", "DT", "WT", "PDT"].contains(&func), "{}", t.name);
        assert!(rest.ends_with(".PV") && rest.starts_with("3"), "{}", t.name);
        assert!(t.range.0 < t.range.1 && !t.units.is_empty() && !t.description.is_empty(), "{}", t.name);
        assert!([5, 30, 60].contains(&(t.period_us / 1_000_000)), "{}", t.name);
    }
    for area in [Area::Evaporator, Area::SprayDryer, Area::BoilerHouse] {
        assert!(d.tags.iter().filter(|t| t.area == area).count() >= 15, "{area:?}");
    }
    assert!(d.tags.iter().any(|t| t.period_us == 30_000_000));
    assert!(d.tags.iter().any(|t| t.period_us == 60_000_000));
}

#[test]
fn start_is_six_local_on_the_second_of_march() {
    let d = demo();
    // 2026-03-02 06:00 CET = 05:00 UTC.
    assert_eq!(crate::io::format_ts_us(d.start_us), "2026-03-02T05:00:00Z");
    assert_eq!(d.end_us - d.start_us, 8 * 3600 * 1_000_000);
    assert_eq!(d.truth_of("FT-3101A.PV").len(), 5760);
    assert_eq!(d.truth_of("AT-3240.PV").len(), 480);
}

#[test]
fn every_fault_kind_is_present_and_most_tags_are_fault_free() {
    let d = demo();
    for kind in Fault::ALL {
        let n = d.truth.faults.iter().filter(|f| f.kind == kind).count();
        assert!(n >= 2 || (kind == Fault::Spike && n >= 5), "{kind:?}: {n}");
    }
    let faulty: BTreeSet<_> = d.truth.faults.iter().map(|f| f.tag).collect();
    assert!(faulty.len() >= 10, "faults on only {} tags", faulty.len());
    assert!(faulty.len() * 2 < d.tags.len(), "{} of {} tags faulty", faulty.len(), d.tags.len());
    for f in &d.truth.faults {
        assert!(d.tag(f.tag).is_some(), "{}", f.tag);
        assert!(f.from_us <= f.to_us && f.from_us > d.start_us && f.to_us < d.end_us, "{f:?}");
        assert!(f.rows > 0, "{f:?}");
    }
    let durations =
        |k: Fault| d.truth.faults.iter().filter(move |f| f.kind == k).map(|f| (f.to_us - f.from_us) / 60_000_000);
    assert!(durations(Fault::Stuck).all(|m| (9..=40).contains(&m)), "stuck durations");
    let drift = d.truth.faults.iter().find(|f| f.tag == "TT-3105B.PV").unwrap();
    assert_eq!(drift.kind, Fault::Drift);
    let rate = drift.rate_per_hour.unwrap();
    let hours = (drift.to_us - drift.from_us) as f64 / 3600e6;
    assert!((drift.bias_end.unwrap() - rate * hours).abs() < 1e-9);
    assert!(drift.bias_end.unwrap() > 1.5);
}

#[test]
fn faults_show_in_the_rows_as_labelled() {
    let d = demo();
    for f in &d.truth.faults {
        let rows: Vec<&ExportRow> =
            d.rows_of(f.tag).iter().filter(|r| f.from_us <= r.ts_us && r.ts_us <= f.to_us).collect();
        assert_eq!(rows.len(), f.rows, "{f:?}");
        let info = d.tag(f.tag).unwrap();
        match f.kind {
            Fault::Spike => {
                assert_eq!(rows.len(), 1);
                let truth = d.truth_of(f.tag).iter().find(|t| t.ts_us == f.from_us).unwrap().value;
                assert!((rows[0].value - truth).abs() > 3.0 * info_noise(f.tag), "{f:?}");
                assert!(f.size.unwrap().abs() > 0.0);
            }
            Fault::Stuck => {
                assert!(rows.iter().all(|r| r.value == f.value.unwrap()), "{f:?}");
                let before = d.rows_of(f.tag).iter().rev().find(|r| r.ts_us < f.from_us).unwrap();
                assert_eq!(before.value, f.value.unwrap());
            }
            Fault::Range => {
                let v = f.value.unwrap();
                assert!(v < info.range.0 || v > info.range.1);
                assert!(rows.iter().all(|r| r.value == v));
            }
            Fault::BadQuality => assert!(rows.iter().all(|r| r.quality == QUALITY_BAD)),
            Fault::Step | Fault::Drift | Fault::Noise => assert!(rows.iter().all(|r| r.quality == QUALITY_GOOD)),
        }
    }
}

fn info_noise(tag: &str) -> f64 {
    catalogue::all().find(|d| d.name == tag).unwrap().noise
}

#[test]
fn redundant_sets_and_exception_tags_are_present() {
    let d = demo();
    for t in ["TT-3105A.PV", "TT-3105B.PV", "TT-3105C.PV", "FT-3101A.PV", "FT-3101B.PV"] {
        assert!(d.tag(t).is_some(), "{t}");
    }
    assert_eq!(d.truth.groups.len(), 2);
    assert_eq!(d.truth.groups[0].trusted, Some("FT-3101A.PV"));
    // The members share one truth.
    assert_eq!(
        d.truth_of("TT-3105A.PV").iter().map(|t| t.value).collect::<Vec<_>>(),
        d.truth_of("TT-3105C.PV").iter().map(|t| t.value).collect::<Vec<_>>()
    );
    // A and C agree within noise; B has drifted by the end.
    let last_mean = |tag: &str| {
        let r = d.rows_of(tag);
        r[r.len() - 60..].iter().map(|r| r.value).sum::<f64>() / 60.0
    };
    let (a, b, c) = (last_mean("TT-3105A.PV"), last_mean("TT-3105B.PV"), last_mean("TT-3105C.PV"));
    assert!((a - c).abs() < 0.05, "{a} {c}");
    assert!((b - a - 2.1).abs() < 0.1, "{a} {b}");

    let exc: Vec<_> = d.tags.iter().filter(|t| matches!(t.sampling, Sampling::Exception { .. })).collect();
    assert!((2..=3).contains(&exc.len()));
    for t in exc {
        let Sampling::Exception { deadband } = t.sampling else { unreachable!() };
        let rows = d.rows_of(t.name);
        let scans = d.truth_of(t.name).len();
        assert!(rows.len() * 3 < scans, "{}: {} rows of {} scans", t.name, rows.len(), scans);
        assert!(rows.len() > 20, "{}: {} rows", t.name, rows.len());
        // Consecutive stored rows (no gap between) differ by more than the deadband.
        for w in rows.windows(2) {
            let in_gap = d
                .truth
                .gaps
                .iter()
                .any(|g| g.tags.contains(&t.name) && g.to_us <= w[1].ts_us && g.from_us > w[0].ts_us);
            assert!(in_gap || (w[1].value - w[0].value).abs() > deadband, "{}: {w:?}", t.name);
        }
    }
}

#[test]
fn row_count_is_the_grid_minus_gaps_and_thinning() {
    let d = demo();
    let scans: usize = d.tags.iter().map(|t| d.truth_of(t.name).len()).sum();
    let gap_rows: usize = d.truth.gaps.iter().map(|g| g.rows).sum();
    let regular_gap_rows: usize = d
        .tags
        .iter()
        .filter(|t| t.sampling == Sampling::Regular)
        .map(|t| {
            d.truth_of(t.name)
                .iter()
                .filter(|v| {
                    d.truth.gaps.iter().any(|g| g.tags.contains(&t.name) && g.from_us <= v.ts_us && v.ts_us < g.to_us)
                })
                .count()
        })
        .sum();
    let regular_scans: usize =
        d.tags.iter().filter(|t| t.sampling == Sampling::Regular).map(|t| d.truth_of(t.name).len()).sum();
    let regular_rows = d.rows.iter().filter(|r| d.tag(r.tag).unwrap().sampling == Sampling::Regular).count();
    assert_eq!(regular_rows, regular_scans - regular_gap_rows);
    assert!(d.rows.len() < scans - gap_rows);
    let nominal = 60 * 5760;
    assert!(d.rows.len() > nominal * 8 / 10 && d.rows.len() < nominal * 11 / 10, "{} rows", d.rows.len());
    // Gaps: 1 to 45 minutes, one longer than 30.
    let minutes: Vec<i64> = d.truth.gaps.iter().map(|g| (g.to_us - g.from_us) / 60_000_000).collect();
    assert!(minutes.contains(&1) && minutes.iter().any(|&m| m > 30 && m <= 45), "{minutes:?}");
    assert!(d.truth.gaps.len() >= 4 && d.truth.gaps.iter().all(|g| g.rows > 0));
    assert!(d.truth.gaps.iter().any(|g| g.tags.len() > 10), "no area-wide outage");
}

#[test]
fn rows_are_sorted_unique_on_the_grid_and_in_the_window() {
    let d = demo();
    assert!(d.rows.windows(2).all(|w| (w[0].tag, w[0].ts_us) < (w[1].tag, w[1].ts_us)));
    for r in &d.rows {
        let t = d.tag(r.tag).unwrap();
        assert!(r.ts_us >= d.start_us && r.ts_us < d.end_us);
        assert_eq!((r.ts_us - d.start_us) % t.period_us, 0);
        assert!(r.value.is_finite());
    }
    assert!(d.truth.values.windows(2).all(|w| (w[0].tag, w[0].ts_us) < (w[1].tag, w[1].ts_us)));
}

#[test]
fn good_rows_are_in_range_except_range_faults() {
    let d = demo();
    let mut outside = 0;
    for r in d.rows.iter().filter(|r| r.quality != QUALITY_BAD) {
        let t = d.tag(r.tag).unwrap();
        if r.value < t.range.0 || r.value > t.range.1 {
            let labelled = d
                .truth
                .faults
                .iter()
                .any(|f| f.kind == Fault::Range && f.tag == r.tag && f.from_us <= r.ts_us && r.ts_us <= f.to_us);
            assert!(labelled, "{r:?} outside {:?}", t.range);
            outside += 1;
        }
    }
    assert!(outside > 0);
    for v in &d.truth.values {
        let t = d.tag(v.tag).unwrap();
        assert!(v.value >= t.range.0 && v.value <= t.range.1, "{v:?}");
    }
}

#[test]
fn quality_bytes_are_classic_opc() {
    let d = demo();
    let used: BTreeSet<u8> = d.rows.iter().map(|r| r.quality).collect();
    assert_eq!(used, BTreeSet::from([QUALITY_BAD, QUALITY_UNCERTAIN, QUALITY_EGU_EXCEEDED, QUALITY_GOOD]));
    assert!(d.truth.uncertain.len() >= 3 && d.truth.uncertain.iter().all(|u| u.rows > 0));
    let uncertain_rows = d.rows.iter().filter(|r| r.quality == QUALITY_UNCERTAIN).count();
    assert_eq!(uncertain_rows, d.truth.uncertain.iter().map(|u| u.rows).sum::<usize>());
}

#[test]
fn process_events_move_several_tags_together() {
    let d = demo();
    let p = &d.truth.process;
    assert_eq!(p.iter().filter(|e| e.kind == ProcessKind::SetpointChange).count(), 2);
    let trip = p.iter().find(|e| e.kind == ProcessKind::Trip).unwrap();
    assert!(trip.tags.len() >= 10 && trip.tags.iter().any(|t| t.starts_with("FT-33")));
    // The dryer feed flow really stops, and the inlet air really cools.
    let at = |tag: &str, t: i64| d.truth_of(tag).iter().find(|v| v.ts_us >= t).unwrap().value;
    assert!(at("FT-3201.PV", trip.from_us - 60_000_000) > 5.0);
    assert!(at("FT-3201.PV", trip.to_us - 60_000_000) < 0.05);
    assert!(at("TT-3210.PV", trip.to_us - 60_000_000) < at("TT-3210.PV", trip.from_us) - 50.0);
    // The first setpoint change raises the feed flow by 2.5 m3/h.
    let sp = &p[0];
    assert_eq!(sp.size, Some(2.5));
    assert!(at("FT-3101A.PV", sp.from_us + 600_000_000) - at("FT-3101A.PV", sp.from_us - 60_000_000) > 1.5);
    // A process event is not a fault: no fault starts on a tag in the same minute as the trip.
    assert!(!d.truth.faults.iter().any(|f| (f.from_us - trip.from_us).abs() < 60_000_000));
}

#[test]
fn fault_scale_scales_sizes_and_hours_stretch_the_plan() {
    let two = generate(&DemoOptions { fault_scale: 2.0, ..DemoOptions::default() });
    let one = demo();
    for (a, b) in one.truth.faults.iter().zip(&two.truth.faults) {
        assert_eq!((a.tag, a.kind, a.from_us), (b.tag, b.kind, b.from_us));
        if matches!(a.kind, Fault::Step | Fault::Drift) {
            assert!((b.size.unwrap() - 2.0 * a.size.unwrap()).abs() < 1e-12);
        }
    }
    let short = generate(&DemoOptions { hours: 2.0, ..DemoOptions::default() });
    assert_eq!(short.truth.faults.len(), one.truth.faults.len());
    for f in &short.truth.faults {
        assert!(f.to_us < short.end_us && f.rows > 0, "{f:?}");
    }
    let odd = generate(&DemoOptions { hours: f64::NAN, fault_scale: -3.0, ..DemoOptions::default() });
    assert_eq!((odd.options.hours, odd.options.fault_scale), (8.0, 0.0));
}

#[test]
fn export_has_the_historian_layout_with_local_times() {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let d = generate(&DemoOptions { hours: 1.0, ..DemoOptions::default() });
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("export.parquet");
    write_export(&d, &path).unwrap();
    let b = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(&path).unwrap()).unwrap();
    let schema = b.schema().clone();
    let types: Vec<String> = schema.fields().iter().map(|f| format!("{}:{}", f.name(), f.data_type())).collect();
    assert_eq!(types, ["tag:Utf8", "ts:Timestamp(ms)", "value:Float64", "quality:Int32"]);
    let n: usize = b.build().unwrap().map(|b| b.unwrap().num_rows()).sum();
    assert_eq!(n, d.rows.len());
    // The reader takes naive times as UTC for now: the local wall clock is one hour ahead (CET).
    let s = crate::io::read_tag(&path, "TT-3105A.PV", &crate::io::ColumnMap::default()).unwrap();
    let rows = d.rows_of("TT-3105A.PV");
    assert_eq!(s.ts_us.len(), rows.len());
    assert_eq!(s.ts_us[0] - 3_600_000_000, rows[0].ts_us);
    assert_eq!(s.values[7], rows[7].value);

    write_truth(&d, dir.path()).unwrap();
    let ev: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join(TRUTH_EVENTS_FILE)).unwrap()).unwrap();
    assert_eq!(ev["start"], "2026-03-02T05:00:00Z");
    assert_eq!(ev["faults"].as_array().unwrap().len(), d.truth.faults.len());
    let drift = ev["faults"].as_array().unwrap().iter().find(|f| f["kind"] == "drift").unwrap();
    assert!(drift["bias_end"].is_number() && drift["rate_per_hour"].is_number());
    let tv = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(dir.path().join(TRUTH_VALUES_FILE)).unwrap())
        .unwrap();
    assert_eq!(tv.schema().field(1).data_type().to_string(), "Timestamp(µs, \"UTC\")");
}

#[test]
fn a_start_the_clocks_skip_moves_one_hour_on() {
    // 2026-03-29 02:30 does not exist in Berlin; 03:30 CEST = 01:30 UTC.
    let start = NaiveDate::from_ymd_opt(2026, 3, 29).unwrap().and_hms_opt(2, 30, 0).unwrap();
    assert_eq!(crate::io::format_ts_us(local_to_utc_us(start)), "2026-03-29T01:30:00Z");
}

#[test]
fn the_demo_pipeline_configures_every_tag_as_the_catalogue_says() {
    use crate::pipeline::PipelineSpec;
    use crate::plugin::Registry;
    let path = std::path::Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/../pipelines/demo.yaml"));
    let text = std::fs::read_to_string(path).unwrap();
    // The model steps live in plugins/ (their crates check their own
    // parameters); here stand-ins that accept any parameters let the
    // pipeline's structure be checked.
    let mut reg = Registry::with_builtins();
    for name in ["faults", "drift", "fill"] {
        reg.register(name, |_| crate::plugin::builtin::make_quality(&serde_json::Value::Null), "stand-in");
    }
    let spec = PipelineSpec::parse(&text, path, &reg).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(spec.site.timezone, SITE_TIMEZONE);
    let d = demo();
    let mut used = BTreeSet::new();
    for t in &d.tags {
        let r = spec.resolve(t.name).unwrap_or_else(|| panic!("{} not selected", t.name));
        assert_eq!(r.rules.len(), 1, "{} selected by rules {:?}", t.name, r.rules);
        used.extend(r.rules.iter().copied());
        let s = &r.settings;
        assert_eq!(s.units.as_deref(), Some(t.units), "{}", t.name);
        assert_eq!(s.range, Some(t.range), "{}", t.name);
        assert_eq!(s.period_us, Some(t.period_us), "{}", t.name);
        assert_eq!(s.sampling, t.sampling, "{}", t.name);
        assert!(s.model.is_some(), "{}", t.name);
        let steps: Vec<&str> = r.steps.iter().map(|s| s.name.as_str()).collect();
        let group = d.truth.groups.iter().find(|g| g.members.contains(&t.name));
        // The lone refractometer, prone to fouling, also runs the lone form
        // of `drift` (a movement report it cannot attribute).
        let want: &[&str] = if group.is_some() || t.name == "AT-3130.PV" {
            &["quality", "range", "faults", "drift", "fill"]
        } else {
            &["quality", "range", "faults", "fill"]
        };
        assert_eq!(steps, want, "{}", t.name);
        match (group, &r.group) {
            (None, None) => {}
            (Some(g), Some(spec_group)) => {
                assert_eq!(spec_group.id, g.name, "{}", t.name);
                assert_eq!(spec_group.trusted.as_deref(), g.trusted, "{}", t.name);
            }
            (g, s) => panic!("{}: truth group {g:?}, pipeline group {s:?}", t.name),
        }
    }
    assert_eq!(used.len(), spec.rules.len(), "a rule selects no demo tag");
}

#[test]
fn the_demo_document_lists_every_tag_and_fault_tag() {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../docs/demo.md")).unwrap();
    for t in &demo().tags {
        assert!(text.contains(&format!("`{}`", t.name)), "docs/demo.md does not list {}", t.name);
    }
    for f in FAULT_PLAN {
        assert!(text.contains(f.tag), "docs/demo.md does not mention the fault on {}", f.tag);
    }
}
