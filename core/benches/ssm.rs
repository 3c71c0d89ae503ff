//! Criterion benches of the state-space core: one local level series through
//! every filter path (scalar, fixed-size, dynamic), ARMA(2,1) on the
//! fixed-size and dynamic paths, the survey's change test, and
//! maximum-likelihood fits. The
//! side-by-side comparison with statsmodels is `vs_statsmodels.sh`.

#![allow(clippy::unwrap_used)] // a bench aborts on a broken fixture; that is the point
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use std::hint::black_box;
use tagwright::plugin::survey;
use tagwright::rng::Rng;
use tagwright::series::{Quality, ReadCounts, TagSeries};
use tagwright::ssm::{
    arma, filter, filter_into, fit, smooth, smooth_into, FilterOptions, FilterOutput, FitOptions, ModelSpec,
    Observations, Path, SmootherOutput,
};

fn local_level_series(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = Rng::new(seed);
    let mut level = 100.0;
    (0..n)
        .map(|_| {
            level += 0.1f64.sqrt() * rng.normal();
            level + rng.normal()
        })
        .collect()
}

fn filter_smooth(c: &mut Criterion) {
    let n = 100_000;
    let y = local_level_series(n, 1);
    let obs = Observations::univariate(&y);
    let ll = "local-level".parse::<ModelSpec>().unwrap().build(&[1.0, 0.1]).unwrap();
    let mut g = c.benchmark_group("local_level_filter_smooth_100k");
    g.throughput(Throughput::Elements(n as u64));
    g.sample_size(20);
    for path in [Path::Scalar, Path::Fixed, Path::General] {
        g.bench_with_input(BenchmarkId::from_parameter(format!("{path:?}")), &path, |b, &path| {
            b.iter(|| {
                let f = filter(&ll, &obs, &FilterOptions { path, ..Default::default() }).unwrap();
                black_box(smooth(&ll, &obs, &f))
            })
        });
    }
    g.bench_function("Scalar_no_steady_state", |b| {
        b.iter(|| {
            let f =
                filter(&ll, &obs, &FilterOptions { path: Path::Scalar, steady_tol: 0.0, store: true, loglik: true })
                    .unwrap();
            black_box(smooth(&ll, &obs, &f))
        })
    });
    g.finish();

    let mut rng = Rng::new(2);
    let (x, _) = arma::simulate(&[0.5, -0.3], &[0.4], 1.0, n, &mut rng).unwrap();
    let obs = Observations::univariate(&x);
    let model = "arma(2,1)".parse::<ModelSpec>().unwrap().build(&[0.5, -0.3, 0.4, 1.0]).unwrap();
    let mut g = c.benchmark_group("arma21_filter_smooth_100k");
    g.throughput(Throughput::Elements(n as u64));
    g.sample_size(20);
    for path in [Path::Fixed, Path::General] {
        g.bench_with_input(BenchmarkId::from_parameter(format!("{path:?}")), &path, |b, &path| {
            b.iter(|| {
                let f = filter(&model, &obs, &FilterOptions { path, ..Default::default() }).unwrap();
                black_box(smooth(&model, &obs, &f))
            })
        });
    }
    g.finish();
}

/// The two-state loops as the cleaning chain runs them: a level + AR(1) at
/// the chain benchmark's parameters over one 12 h shift at 1 s (43,200
/// points, 40 of them missing), the filter storing its arrays without the
/// filtered ones and without summing the log-likelihood, and the smoother
/// keeping the signal, its variance, the auxiliary and the deletion
/// residuals (the lean arrays). Filter and smoother are timed apart.
fn two_state_loops(c: &mut Criterion) {
    let n = 43_200;
    let mut rng = Rng::new(5);
    let (ar, _) = arma::simulate(&[0.995], &[], 0.01, n, &mut rng).unwrap();
    let y: Vec<f64> = ar
        .iter()
        .enumerate()
        .map(|(t, x)| if t % 1080 == 7 { f64::NAN } else { 5.0 + x + 0.05 * rng.normal() })
        .collect();
    let obs = Observations::univariate(&y);
    let model = "local-level+arma(1,0)".parse::<ModelSpec>().unwrap().build(&[0.0025, 1e-10, 0.995, 0.01]).unwrap();
    let opts = FilterOptions { path: Path::Fixed, steady_tol: 0.0, store: true, loglik: false };
    let mut f = FilterOutput { skip_filtered: true, ..Default::default() };
    let mut g = c.benchmark_group("level_ar1_43k");
    g.throughput(Throughput::Elements(n as u64));
    g.sample_size(30);
    g.bench_function("filter", |b| b.iter(|| filter_into(&model, &obs, &opts, black_box(&mut f)).unwrap()));
    filter_into(&model, &obs, &opts, &mut f).unwrap();
    let mut s = SmootherOutput { keep_aux: true, keep_del: true, lean: true, ..Default::default() };
    g.bench_function("smoother", |b| b.iter(|| smooth_into(&model, &obs, &f, black_box(&mut s))));
    g.finish();
}

/// The plant-wide survey's change test on one tag of a shift at 1 s (the
/// engine runs it on every regular tag before the steps).
fn survey_one_tag(c: &mut Criterion) {
    let n = 43_200;
    let mut rng = Rng::new(6);
    let (ar, _) = arma::simulate(&[0.995], &[], 0.01, n, &mut rng).unwrap();
    let s = TagSeries {
        tag: "FT-1".into(),
        ts_us: (0..n as i64).map(|i| i * 1_000_000).collect(),
        values: ar.iter().map(|x| 5.0 + x + 0.05 * rng.normal()).collect(),
        quality: vec![Quality::Good; n],
        counts: ReadCounts::default(),
    };
    let mut g = c.benchmark_group("survey_43k");
    g.throughput(Throughput::Elements(n as u64));
    g.sample_size(30);
    g.bench_function("change_times", |b| b.iter(|| black_box(survey::change_times(&s, 1_000_000))));
    g.finish();
}

fn fits(c: &mut Criterion) {
    let y = local_level_series(10_000, 3);
    let obs = Observations::univariate(&y);
    let mut g = c.benchmark_group("fit_10k");
    g.sample_size(20);
    let ll: ModelSpec = "local-level".parse().unwrap();
    g.bench_function("local_level", |b| b.iter(|| black_box(fit(&ll, &obs, &FitOptions::default()).unwrap())));
    let mut rng = Rng::new(4);
    let (x, _) = arma::simulate(&[0.5, -0.3], &[0.4], 1.0, 10_000, &mut rng).unwrap();
    let xo = Observations::univariate(&x);
    let am: ModelSpec = "arma(2,1)".parse().unwrap();
    for path in [Path::Fixed, Path::General] {
        g.bench_with_input(BenchmarkId::new("arma21", format!("{path:?}")), &path, |b, &path| {
            b.iter(|| black_box(fit(&am, &xo, &FitOptions { path, ..Default::default() }).unwrap()))
        });
    }
    g.finish();
}

criterion_group!(benches, filter_smooth, two_state_loops, survey_one_tag, fits);
criterion_main!(benches);
