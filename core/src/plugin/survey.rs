//! Plant-wide evidence of abrupt changes, for telling a process change from
//! a sensor fault.
//!
//! A legitimate process change (a trip, a setpoint change) moves the process,
//! so it shows in several tags at about the same time; a sensor step shows in
//! one tag alone. Before the steps run, the engine surveys every selected
//! regular tag with a cheap model-free test and records the times of abrupt
//! level changes; a step that finds a level shift in one tag asks the survey
//! how many *other* tags changed near that time.
//!
//! The test: with `k` readings on each side of t, the difference of the two
//! means d_t = mean(y[t..t+k]) - mean(y[t-k..t]); its typical size is the
//! robust scale s = 1.4826 MAD(d) over the tag's window; t is a change when
//! |d_t| > `SURVEY_Z` s and |d_t| is the largest of its excursion above that
//! bound. Windows that straddle a gap (more than 2k periods of time) are
//! skipped. The scale is the tag's own, so slow wander, however large, is
//! the yardstick, and only changes that are abrupt for that tag count.

use crate::series::{Quality, TagSeries};

/// Readings on each side of the survey's two-mean test.
pub const SURVEY_K: usize = 6;
/// Bound of the test in robust standard deviations of the two-mean difference.
pub const SURVEY_Z: f64 = 6.0;

/// Times of abrupt changes per tag.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Survey {
    /// (time µs UTC, tag index), sorted.
    changes: Vec<(i64, u32)>,
    tags: Vec<String>,
    /// Group of each tag (redundant transmitters), if any.
    groups: Vec<Option<String>>,
}

impl Survey {
    /// An empty survey.
    pub fn new() -> Self {
        Survey::default()
    }

    /// Adds one tag's change times; `group` is its coupling group, if any.
    pub fn add(&mut self, tag: &str, group: Option<&str>, times: &[i64]) {
        let id = match self.tags.iter().position(|t| t == tag) {
            Some(i) => i as u32,
            None => {
                self.tags.push(tag.to_string());
                self.groups.push(group.map(str::to_string));
                (self.tags.len() - 1) as u32
            }
        };
        self.changes.extend(times.iter().map(|&t| (t, id)));
    }

    /// Sorts the changes; call once after the last [`Survey::add`].
    pub fn finish(&mut self) {
        self.changes.sort_unstable();
    }

    /// Number of tags surveyed with at least one change.
    pub fn tags_with_changes(&self) -> usize {
        let mut ids: Vec<u32> = self.changes.iter().map(|c| c.1).collect();
        ids.sort_unstable();
        ids.dedup();
        ids.len()
    }

    /// The change times of `tag`.
    pub fn times_of(&self, tag: &str) -> Vec<i64> {
        let Some(me) = self.tags.iter().position(|t| t == tag) else { return Vec::new() };
        self.changes.iter().filter(|c| c.1 as usize == me).map(|c| c.0).collect()
    }

    /// True if `tag` itself has a change in [from, to].
    pub fn changed(&self, tag: &str, from_us: i64, to_us: i64) -> bool {
        let a = self.changes.partition_point(|c| c.0 < from_us);
        self.changes[a..]
            .iter()
            .take_while(|c| c.0 <= to_us)
            .any(|c| self.tags.get(c.1 as usize).is_some_and(|t| t == tag))
    }

    /// The other members of `tag`'s group, and whether every one of them has
    /// a change in [from, to]. `None` when the tag has no group or is alone in it.
    pub fn group_moved(&self, tag: &str, from_us: i64, to_us: i64) -> Option<bool> {
        let me = self.tags.iter().position(|t| t == tag)?;
        let g = self.groups.get(me)?.as_ref()?;
        let members: Vec<&str> = self
            .tags
            .iter()
            .zip(&self.groups)
            .filter(|(t, gg)| *t != tag && gg.as_ref() == Some(g))
            .map(|(t, _)| t.as_str())
            .collect();
        if members.is_empty() {
            return None;
        }
        let moved = self.others_within(tag, from_us, to_us);
        Some(members.iter().all(|m| moved.contains(m)))
    }

    /// Whether a level change of `tag` at `at_us` is explained by the
    /// process: every other member of its redundant group changed within
    /// ±`window_us`, or at least `min_tags` other tags did. Returns the
    /// corroborating tags when it is.
    pub fn process_change(&self, tag: &str, at_us: i64, window_us: i64, min_tags: usize) -> Option<Vec<&str>> {
        let (a, b) = (at_us - window_us, at_us + window_us);
        let others = self.others_within(tag, a, b);
        let group = self.group_moved(tag, a, b) == Some(true);
        (group || (min_tags > 0 && others.len() >= min_tags)).then_some(others)
    }

    /// Distinct tags other than `tag` with a change in [from, to], sorted by name.
    pub fn others_within(&self, tag: &str, from_us: i64, to_us: i64) -> Vec<&str> {
        let a = self.changes.partition_point(|c| c.0 < from_us);
        let mut names: Vec<&str> = self.changes[a..]
            .iter()
            .take_while(|c| c.0 <= to_us)
            .filter_map(|c| self.tags.get(c.1 as usize).map(String::as_str))
            .filter(|t| *t != tag)
            .collect();
        names.sort_unstable();
        names.dedup();
        names
    }
}

/// Change times of one tag's readings (bad-quality and non-finite readings
/// are skipped). `period_us` is the tag's nominal period.
pub fn change_times(s: &TagSeries, period_us: i64) -> Vec<i64> {
    let k = SURVEY_K;
    let usable = |v: f64, q: Quality| v.is_finite() && q != Quality::Bad;
    // The readings themselves when every one is usable (most tags), else a
    // copy of the usable ones (sized for all of them up front: a filtered
    // collect grows by copying).
    let kept: (Vec<i64>, Vec<f64>);
    let (ts, y): (&[i64], &[f64]) = if s.values.iter().zip(&s.quality).all(|(&v, &q)| usable(v, q)) {
        (&s.ts_us, &s.values)
    } else {
        // Each reading is written at the next free place, which moves on
        // only past a usable one (no branch per reading, no growing).
        let m = s.values.len().min(s.ts_us.len()).min(s.quality.len());
        let (mut ts, mut y) = (vec![0; m], vec![0.0; m]);
        let mut j = 0;
        for i in 0..m {
            ts[j] = s.ts_us[i];
            y[j] = s.values[i];
            j += usize::from(usable(s.values[i], s.quality[i]));
        }
        ts.truncate(j);
        y.truncate(j);
        kept = (ts, y);
        (&kept.0, &kept.1)
    };
    let n = y.len();
    if n < 4 * k {
        return Vec::new();
    }
    let span = 2 * k as i64 * period_us.max(1);
    // d_t = k (mean of the k readings from t on - mean of the k before t):
    // the test's statistic times k, so its bound is k times the module
    // header's too (the same test, without a division per reading), where
    // those 2k readings span at most 2k periods (NaN elsewhere). From the
    // running sums P_p = y_0 + .. + y_(p-1): d_t = (P_(t+k) - P_t) - (P_t -
    // P_(t-k)). One pass takes the running sum on and, as soon as P_p is
    // known, writes d at t = p - k and |d| (compacted where d is defined);
    // the last 2k + 1 sums wait in a ring, so no array of sums is stored
    // and read back. (The sums are taken in the same order as one prefix
    // array would be, so d is the same to the bit.)
    const RING: usize = 16;
    const _: () = assert!(RING > 2 * SURVEY_K);
    let mut ring = [0.0f64; RING];
    let mut d = vec![f64::NAN; n];
    let mut abs = vec![0.0; n];
    let mut j = 0;
    let mut sum = 0.0;
    for (i, &v) in y.iter().enumerate() {
        sum += v;
        let p = i + 1;
        ring[p % RING] = sum;
        if p >= 2 * k {
            let (pt, pb) = (ring[(p - k) % RING], ring[(p - 2 * k) % RING]);
            let step = (sum - pt) - (pt - pb);
            let dt = if ts[i] - ts[p - 2 * k] <= span { step } else { f64::NAN };
            d[p - k] = dt;
            abs[j] = dt.abs();
            j += usize::from(dt.is_finite());
        }
    }
    abs.truncate(j);
    if abs.len() < 2 * k {
        return Vec::new();
    }
    // MAD of d around 0 (d is centred at 0 by construction), k times the
    // difference of means' MAD.
    let mid = abs.len() / 2;
    let scale = 1.4826 * kth_smallest(&mut abs, mid);
    if scale <= 0.0 {
        return Vec::new();
    }
    let bound = SURVEY_Z * scale;
    let mut out = Vec::new();
    // (Most stretches of 8 hold nothing above the bound: each is tested
    // whole without a branch per value and skipped. NaN is never above.)
    const BLOCK: usize = 8;
    let quiet = |b: &[f64]| !b.iter().fold(false, |any, x| any | (x.abs() > bound));
    let mut t = 0;
    while t < n {
        if t % BLOCK == 0 && t + BLOCK <= n && quiet(&d[t..t + BLOCK]) {
            t += BLOCK;
            continue;
        }
        t = excursion(&d, y, ts, bound, t, &mut out);
    }
    out
}

/// Past the excursion of |d| above `bound` that starts at `t` (one value
/// past `t` when there is none): the time of its largest |d| goes to `out`
/// when the medians of the k readings either side of it differ by more
/// than the bound too (a lone spike does not move them). Returns where the
/// scan goes on.
fn excursion(d: &[f64], y: &[f64], ts: &[i64], bound: f64, mut t: usize, out: &mut Vec<i64>) -> usize {
    let (k, n) = (SURVEY_K, d.len());
    let above = |v: f64| v.is_finite() && v.abs() > bound;
    if !above(d[t]) {
        return t + 1;
    }
    let mut best = t;
    while t < n && above(d[t]) {
        if d[t].abs() > d[best].abs() {
            best = t;
        }
        t += 1;
    }
    if best >= k && best + k <= n {
        let dm = median6(&y[best..best + k]) - median6(&y[best - k..best]);
        if dm.abs() * k as f64 > bound {
            out.push(ts[best]);
        }
    }
    t
}

/// The `k`-th smallest of `v` (0-based; the value `select_nth_unstable`
/// puts at `k`), for finite values. `v` is reordered.
///
/// A long slice is bracketed first: two order statistics of an evenly
/// spaced sample of 1,024 values, about four standard deviations of the
/// sample rank either side of `k`, bound a stretch that holds the answer
/// (checked by counting), and only the values inside it are selected among,
/// gathered in place at the front of `v`. Where the check fails (a sample
/// that misrepresents the slice) the whole slice is selected. Same value
/// either way; with it the change test on a shift's 43,200 readings went
/// from 205 to 196 µs (criterion bench survey_43k).
fn kth_smallest(v: &mut [f64], k: usize) -> f64 {
    const SAMPLE: usize = 1024;
    const MARGIN: usize = 64;
    let n = v.len();
    if k >= n {
        return f64::NAN;
    }
    if n >= 8 * SAMPLE {
        let stride = n / SAMPLE;
        let mut sample: Vec<f64> = (0..SAMPLE).map(|i| v[i * stride]).collect();
        sample.sort_unstable_by(f64::total_cmp);
        let r = k * SAMPLE / n;
        let lo = if r >= MARGIN { sample[r - MARGIN] } else { f64::NEG_INFINITY };
        let hi = if r + MARGIN < SAMPLE { sample[r + MARGIN] } else { f64::INFINITY };
        let (mut below, mut inside) = (0usize, 0usize);
        for &x in v.iter() {
            below += usize::from(x < lo);
            inside += usize::from(x >= lo && x <= hi);
        }
        if below <= k && k < below + inside {
            let mut j = 0;
            for i in 0..n {
                let x = v[i];
                v[j] = x;
                j += usize::from(x >= lo && x <= hi);
            }
            let part = &mut v[..j];
            part.select_nth_unstable_by(k - below, f64::total_cmp);
            return part[k - below];
        }
    }
    v.select_nth_unstable_by(k, f64::total_cmp);
    v[k]
}

/// Median of a short slice.
fn median6(v: &[f64]) -> f64 {
    let mut buf = [0.0; SURVEY_K];
    let n = v.len().min(SURVEY_K);
    buf[..n].copy_from_slice(&v[..n]);
    let b = &mut buf[..n];
    b.sort_unstable_by(f64::total_cmp);
    if n % 2 == 1 {
        b[n / 2]
    } else {
        0.5 * (b[n / 2 - 1] + b[n / 2])
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;
    use crate::series::ReadCounts;

    fn series(tag: &str, values: Vec<f64>) -> TagSeries {
        let n = values.len();
        TagSeries {
            tag: tag.into(),
            ts_us: (0..n as i64).map(|i| i * 5_000_000).collect(),
            values,
            quality: vec![Quality::Good; n],
            counts: ReadCounts::default(),
        }
    }

    #[test]
    fn a_step_is_found_and_a_spike_or_noise_is_not() {
        let mut rng = Rng::new(9);
        let mut v: Vec<f64> = (0..2000).map(|_| 5.0 + 0.1 * rng.normal()).collect();
        v[500] += 3.0; // a spike moves a k-mean by 0.5 only
        for x in v.iter_mut().skip(1200) {
            *x += 1.0;
        }
        let c = change_times(&series("FT-1", v), 5_000_000);
        assert_eq!(c, vec![1200 * 5_000_000]);
        let mut rng = Rng::new(10);
        let quiet: Vec<f64> = (0..2000).map(|_| 5.0 + 0.1 * rng.normal()).collect();
        assert!(change_times(&series("FT-2", quiet), 5_000_000).is_empty());
    }

    /// The change test written the plain way (each mean summed afresh,
    /// the median by sorting, every value visited), for comparison; the
    /// excursions are taken by the same `excursion`.
    fn change_times_plain(ts: &[i64], y: &[f64], period_us: i64) -> Vec<i64> {
        let (k, n) = (SURVEY_K, y.len());
        let span = 2 * k as i64 * period_us;
        let mut d = vec![f64::NAN; n];
        for t in k..=n - k {
            if ts[t + k - 1] - ts[t - k] <= span {
                d[t] = y[t..t + k].iter().sum::<f64>() - y[t - k..t].iter().sum::<f64>();
            }
        }
        let mut abs: Vec<f64> = d.iter().filter(|v| v.is_finite()).map(|v| v.abs()).collect();
        abs.sort_by(f64::total_cmp);
        let bound = SURVEY_Z * 1.4826 * abs[abs.len() / 2];
        // (Every value visited; the excursions as the test takes them.)
        let mut out = Vec::new();
        let mut t = 0;
        while t < n {
            t = excursion(&d, y, ts, bound, t, &mut out);
        }
        out
    }

    #[test]
    fn change_times_agree_with_the_plain_test() {
        // Wandering tags with steps of several sizes (some near the bound),
        // spikes, and gaps that windows must not straddle.
        for seed in 1..=20 {
            let mut rng = Rng::new(100 + seed);
            let n = 20_000;
            let mut x = 0.0;
            let mut ts = Vec::with_capacity(n);
            let mut t = 0i64;
            let mut level = 10.0;
            let sign = if seed % 2 == 0 { 1.0 } else { -1.0 };
            let v: Vec<f64> = (0..n)
                .map(|i| {
                    x = 0.995 * x + 0.02 * rng.normal();
                    t += if i % 3_001 == 0 { 40_000_000 } else { 1_000_000 };
                    ts.push(t);
                    if i > 0 && i % 2_500 == 0 {
                        level += sign * [0.1, 0.3, 0.8][(i / 2_500) % 3];
                    }
                    let spike = if i % 997 == 0 { 1.0 } else { 0.0 };
                    level + x + spike + 0.01 * rng.normal()
                })
                .collect();
            let s = TagSeries {
                tag: "FT-9".into(),
                ts_us: ts.clone(),
                values: v.clone(),
                quality: vec![Quality::Good; n],
                counts: ReadCounts::default(),
            };
            let found = change_times(&s, 1_000_000);
            assert_eq!(found, change_times_plain(&ts, &v, 1_000_000), "seed {seed}");
            assert!(!found.is_empty(), "seed {seed}: the steps are found");
        }
    }

    #[test]
    fn kth_smallest_is_the_order_statistic_whatever_the_order_of_the_values() {
        let mut rng = Rng::new(11);
        // Shuffled, sorted, reversed, tied and wandering values, short and
        // long (the long ones take the bracketed path).
        let n = 20_000;
        let noise: Vec<f64> = (0..n).map(|_| rng.normal().abs()).collect();
        let mut walk = vec![0.0; n];
        for i in 1..n {
            walk[i] = walk[i - 1] + rng.normal();
        }
        let mut sorted = noise.clone();
        sorted.sort_unstable_by(f64::total_cmp);
        let reversed: Vec<f64> = sorted.iter().rev().copied().collect();
        let tied: Vec<f64> = (0..n).map(|i| (i % 7) as f64).collect();
        let short: Vec<f64> = noise[..501].to_vec();
        for v in [noise, walk, sorted, reversed, tied, short] {
            for k in [0, v.len() / 2, v.len() / 3, v.len() - 1] {
                let mut want = v.clone();
                want.sort_unstable_by(f64::total_cmp);
                let mut got = v.clone();
                assert_eq!(kth_smallest(&mut got, k), want[k], "k = {k} of {}", v.len());
            }
        }
        assert!(kth_smallest(&mut [1.0, 2.0], 2).is_nan());
    }

    #[test]
    fn others_within_counts_distinct_other_tags() {
        let mut s = Survey::new();
        s.add("A", Some("g"), &[100, 5_000]);
        s.add("B", Some("g"), &[120]);
        s.add("C", None, &[130, 140, 6_000]);
        s.finish();
        // A's change at 5000 is seen by no other tag; at 100, by its group.
        assert_eq!(s.process_change("A", 100, 50, 5), Some(vec!["B", "C"]));
        assert_eq!(s.process_change("A", 5_000, 50, 1), None);
        assert_eq!(s.group_moved("C", 0, 200), None);
        assert!(s.changed("C", 5_900, 6_100) && !s.changed("A", 5_900, 6_100));
        assert_eq!(s.others_within("A", 0, 200), vec!["B", "C"]);
        assert_eq!(s.others_within("B", 0, 200), vec!["A", "C"]);
        assert!(s.others_within("A", 200, 4_000).is_empty());
        assert_eq!(s.tags_with_changes(), 3);
    }
}
