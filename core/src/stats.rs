//! Distribution functions the detectors need: normal and chi-square
//! quantiles, and the conversion of a false-alarm rate per tag per shift into
//! a per-test probability.
//!
//! - Normal quantile: Wichura (1988), algorithm AS 241 (PPND16), accurate to
//!   about 1e-16 relative.
//! - Regularised lower incomplete gamma P(a, x): series for x < a + 1,
//!   continued fraction (modified Lentz) otherwise (Press et al., Numerical
//!   Recipes, 3rd ed., 2007, §6.2).
//! - Chi-square quantile: Wilson & Hilferty (1931) start, then Newton steps
//!   on P(k/2, x/2) with bisection safeguards.

/// Natural log of the gamma function, Lanczos approximation (g = 7, n = 9;
/// Press et al. 2007, §6.1), about 15 significant digits for x > 0.
pub fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        // Reflection: Gamma(x) Gamma(1 - x) = pi / sin(pi x).
        let pi = std::f64::consts::PI;
        return (pi / (pi * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut a = C[0];
    let t = x + G + 0.5;
    for (i, c) in C.iter().enumerate().skip(1) {
        a += c / (x + i as f64);
    }
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + a.ln()
}

/// Regularised lower incomplete gamma function P(a, x), a > 0, x >= 0.
pub fn gamma_p(a: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    let ln_pre = -x + a * x.ln() - ln_gamma(a);
    if x < a + 1.0 {
        let (mut sum, mut term, mut ap) = (1.0 / a, 1.0 / a, a);
        for _ in 0..10_000 {
            ap += 1.0;
            term *= x / ap;
            sum += term;
            if term.abs() < sum.abs() * 1e-16 {
                break;
            }
        }
        (sum.ln() + ln_pre).exp().min(1.0)
    } else {
        (1.0 - (ln_pre.exp() * gamma_q_fraction(a, x))).max(0.0)
    }
}

/// The continued fraction of Q(a, x) = 1 - P(a, x) without its prefactor
/// x^a e^-x / Gamma(a) (modified Lentz; Press et al. 2007, §6.2), for x >= a + 1.
fn gamma_q_fraction(a: f64, x: f64) -> f64 {
    let tiny = 1e-300;
    let mut b = x + 1.0 - a;
    let mut c = 1.0 / tiny;
    let mut d = 1.0 / b;
    let mut h = d;
    for i in 1..10_000 {
        let an = -(i as f64) * (i as f64 - a);
        b += 2.0;
        d = an * d + b;
        if d.abs() < tiny {
            d = tiny;
        }
        c = b + an / c;
        if c.abs() < tiny {
            c = tiny;
        }
        d = 1.0 / d;
        let del = d * c;
        h *= del;
        if (del - 1.0).abs() < 1e-16 {
            break;
        }
    }
    h
}

/// Chi-square distribution function with `k` degrees of freedom.
pub fn chi2_cdf(x: f64, k: f64) -> f64 {
    gamma_p(k / 2.0, x / 2.0)
}

/// Upper tail of the chi-square distribution, 1 - F(x), computed without
/// cancellation for small tails.
pub fn chi2_sf(x: f64, k: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    let a = k / 2.0;
    let xx = x / 2.0;
    if xx < a + 1.0 {
        1.0 - gamma_p(a, xx)
    } else {
        let ln_pre = -xx + a * xx.ln() - ln_gamma(a);
        (ln_pre.exp() * gamma_q_fraction(a, xx)).clamp(0.0, 1.0)
    }
}

/// Standard normal quantile Phi^{-1}(p), 0 < p < 1 (AS 241, Wichura 1988).
/// Returns -inf / +inf at 0 / 1 and NaN outside [0, 1].
pub fn normal_quantile(p: f64) -> f64 {
    if !(0.0..=1.0).contains(&p) || p.is_nan() {
        return f64::NAN;
    }
    if p == 0.0 {
        return f64::NEG_INFINITY;
    }
    if p == 1.0 {
        return f64::INFINITY;
    }
    let q = p - 0.5;
    if q.abs() <= 0.425 {
        let r = 0.180625 - q * q;
        return q
            * (((((((r * 2_509.080_928_730_122_7 + 33_430.575_583_588_13) * r + 67_265.770_927_008_7) * r
                + 45_921.953_931_549_87)
                * r
                + 13_731.693_765_509_46)
                * r
                + 1_971.590_950_306_551_3)
                * r
                + 133.141_667_891_784_38)
                * r
                + 3.387_132_872_796_366_5)
            / (((((((r * 5_226.495_278_852_545 + 28_729.085_735_721_943) * r + 39_307.895_800_092_71) * r
                + 21_213.794_301_586_597)
                * r
                + 5_394.196_021_424_751)
                * r
                + 687.187_007_492_057_9)
                * r
                + 42.313_330_701_600_91)
                * r
                + 1.0);
    }
    let r0 = if q < 0.0 { p } else { 1.0 - p };
    let mut r = (-r0.ln()).sqrt();
    let val = if r <= 5.0 {
        r -= 1.6;
        (((((((r * 7.745_450_142_783_414e-4 + 0.022_723_844_989_269_184) * r + 0.241_780_725_177_450_6) * r
            + 1.270_458_252_452_368_4)
            * r
            + 3.647_848_324_763_204_5)
            * r
            + 5.769_497_221_460_691)
            * r
            + 4.630_337_846_156_546)
            * r
            + 1.423_437_110_749_683_5)
            / (((((((r * 1.050_750_071_644_416_9e-9 + 5.475_938_084_995_345e-4) * r + 0.015_198_666_563_616_457)
                * r
                + 0.148_103_976_427_480_08)
                * r
                + 0.689_767_334_985_1)
                * r
                + 1.676_384_830_183_803_8)
                * r
                + 2.053_191_626_637_759)
                * r
                + 1.0)
    } else {
        r -= 5.0;
        (((((((r * 2.010_334_399_292_288_1e-7 + 2.711_555_568_743_487_6e-5) * r + 0.001_242_660_947_388_078_4) * r
            + 0.026_532_189_526_576_124)
            * r
            + 0.296_560_571_828_504_9)
            * r
            + 1.784_826_539_917_291_3)
            * r
            + 5.463_784_911_164_114)
            * r
            + 6.657_904_643_501_103)
            / (((((((r * 2.044_263_103_389_939_7e-15 + 1.421_511_758_316_446e-7) * r + 1.846_318_317_510_054_8e-5)
                * r
                + 7.868_691_311_456_133e-4)
                * r
                + 0.014_875_361_290_850_615)
                * r
                + 0.136_929_880_922_735_8)
                * r
                + 0.599_832_206_555_888)
                * r
                + 1.0)
    };
    if q < 0.0 {
        -val
    } else {
        val
    }
}

/// Chi-square quantile: the x with P(X <= x) = p for `k` degrees of freedom
/// (k > 0, 0 < p < 1). For upper-tail probabilities below about 1e-12 use
/// [`chi2_upper_quantile`], which solves on the tail directly.
pub fn chi2_quantile(p: f64, k: f64) -> f64 {
    if !(p > 0.0 && p < 1.0 && k > 0.0) {
        return f64::NAN;
    }
    solve_chi2(k, |x| chi2_cdf(x, k) - p, normal_quantile(p), p.min(1.0 - p))
}

/// Chi-square upper quantile: the x with P(X > x) = alpha.
pub fn chi2_upper_quantile(alpha: f64, k: f64) -> f64 {
    if !(alpha > 0.0 && alpha < 1.0 && k > 0.0) {
        return f64::NAN;
    }
    solve_chi2(k, |x| alpha - chi2_sf(x, k), normal_quantile(1.0 - alpha), alpha)
}

/// Root of a monotone increasing `g` in x > 0, started at the Wilson-Hilferty
/// approximation for the normal quantile `z`; `scale` is the size of the
/// probability being matched (the tolerance is relative to it).
fn solve_chi2(k: f64, g: impl Fn(f64) -> f64, z: f64, scale: f64) -> f64 {
    let c = 2.0 / (9.0 * k);
    let mut x = (k * (1.0 - c + z * c.sqrt()).powi(3)).max(1e-8);
    let (mut lo, mut hi) = (0.0_f64, f64::INFINITY);
    for _ in 0..200 {
        let gx = g(x);
        if gx.abs() < 1e-14 * scale {
            return x;
        }
        if gx > 0.0 {
            hi = x;
        } else {
            lo = x;
        }
        // Newton step with the chi-square density.
        let ln_pdf = (k / 2.0 - 1.0) * x.ln() - x / 2.0 - (k / 2.0) * 2f64.ln() - ln_gamma(k / 2.0);
        let mut next = x - gx / ln_pdf.exp();
        if !next.is_finite() || next <= lo || next >= hi {
            next = if hi.is_finite() { 0.5 * (lo + hi) } else { 2.0 * x.max(1.0) };
        }
        if (next - x).abs() <= 1e-14 * x.max(1.0) {
            return next;
        }
        x = next;
    }
    x
}

/// Per-test probability for a false-alarm rate: `rate` false alarms per tag
/// per shift of `tests_per_shift` independent tests (alpha = rate / n,
/// clamped to (0, 0.5]).
pub fn per_test_alpha(rate: f64, tests_per_shift: f64) -> f64 {
    (rate / tests_per_shift.max(1.0)).clamp(1e-300, 0.5)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Chi-square upper percentage points from the NIST/SEMATECH e-Handbook of
    /// Statistical Methods, §1.3.6.7.4 (table printed to 3 decimals; values
    /// typed from memory of that table and of Abramowitz & Stegun Table 26.8).
    #[test]
    fn chi_square_quantiles_match_the_published_table() {
        let table = [
            (1.0, 0.95, 3.841),
            (2.0, 0.95, 5.991),
            (10.0, 0.99, 23.209),
            (30.0, 0.95, 43.773),
            (60.0, 0.999, 99.607),
            (100.0, 0.99, 135.807),
            (5.0, 0.05, 1.145),
        ];
        for (k, p, x) in table {
            let q = chi2_quantile(p, k);
            assert!((q - x).abs() < 6e-4, "chi2({k}) quantile {p}: {q} vs table {x}");
            assert!((chi2_cdf(x, k) - p).abs() < 1e-4);
            let up = chi2_upper_quantile(1.0 - p, k);
            assert!((up - q).abs() < 1e-8 * q.max(1.0), "{up} vs {q}");
        }
    }

    /// Normal quantiles from the same handbook, §1.3.6.7.1 (and A&S Table 26.1),
    /// from memory, to 5 decimals.
    #[test]
    fn normal_quantiles_match_the_published_table() {
        for (p, z) in [(0.975, 1.95996), (0.995, 2.57583), (0.9995, 3.29053), (0.99995, 3.89059), (0.5, 0.0)] {
            let q = normal_quantile(p);
            assert!((q - z).abs() < 6e-6, "Phi^-1({p}) = {q}, table {z}");
            assert!((normal_quantile(1.0 - p) + z).abs() < 6e-6);
        }
        assert_eq!(normal_quantile(0.0), f64::NEG_INFINITY);
        assert!(normal_quantile(1.5).is_nan());
        // Far tail: chi-square with 1 degree of freedom is z^2.
        let alpha = 1e-9;
        let z = normal_quantile(1.0 - alpha / 2.0);
        assert!((chi2_upper_quantile(alpha, 1.0) - z * z).abs() < 1e-6 * z * z);
    }

    #[test]
    fn upper_tail_has_no_cancellation() {
        let x = chi2_upper_quantile(1e-15, 60.0);
        let sf = chi2_sf(x, 60.0);
        assert!((sf / 1e-15 - 1.0).abs() < 1e-6, "{sf}");
        assert!(per_test_alpha(0.05, 5760.0) > 8.6e-6 && per_test_alpha(0.05, 5760.0) < 8.7e-6);
    }
}
