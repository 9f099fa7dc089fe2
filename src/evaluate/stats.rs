//! The statistics `evaluate` reports, as pure functions of counts and scores: exact binomial
//! intervals, McNemar's exact test, and the special functions they need. Checked against
//! statsmodels and SciPy in the tests (tests/it/evaluate.rs).

/// ln Γ(x) for x > 0 by the Lanczos approximation (g = 7, 9 coefficients; about 15 significant
/// digits), with the reflection formula below 0.5.
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

/// The regularised incomplete beta function I_x(a, b), by its continued fraction (evaluated
/// with the modified Lentz method), using the symmetry I_x(a, b) = 1 − I_{1−x}(b, a) where
/// the fraction converges slowly.
pub fn inc_beta(x: f64, a: f64, b: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let front = (ln_gamma(a + b) - ln_gamma(a) - ln_gamma(b) + a * x.ln() + b * (1.0 - x).ln()).exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        front * beta_fraction(x, a, b) / a
    } else {
        1.0 - front * beta_fraction(1.0 - x, b, a) / b
    }
}

fn beta_fraction(x: f64, a: f64, b: f64) -> f64 {
    const TINY: f64 = 1e-300;
    let mut c = 1.0;
    let mut d = 1.0 - (a + b) * x / (a + 1.0);
    if d.abs() < TINY {
        d = TINY;
    }
    d = 1.0 / d;
    let mut h = d;
    for m in 1..=500 {
        let m = f64::from(m);
        for num in [
            m * (b - m) * x / ((a + 2.0 * m - 1.0) * (a + 2.0 * m)),
            -(a + m) * (a + b + m) * x / ((a + 2.0 * m) * (a + 2.0 * m + 1.0)),
        ] {
            d = 1.0 + num * d;
            if d.abs() < TINY {
                d = TINY;
            }
            c = 1.0 + num / c;
            if c.abs() < TINY {
                c = TINY;
            }
            d = 1.0 / d;
            h *= d * c;
            if (d * c - 1.0).abs() < 1e-15 {
                return h;
            }
        }
    }
    h
}

/// The p-quantile of the Beta(a, b) distribution, by bisection on [`inc_beta`] (monotone in
/// x), to 1e-13.
pub fn beta_quantile(p: f64, a: f64, b: f64) -> f64 {
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if inc_beta(mid, a, b) < p {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-13 {
            break;
        }
    }
    0.5 * (lo + hi)
}

/// A proportion with its exact two-sided interval.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Proportion {
    /// Successes.
    pub k: u64,
    /// Trials.
    pub n: u64,
    /// k / n (0 when n = 0).
    pub rate: f64,
    /// Lower end of the 95% Clopper–Pearson interval.
    pub low: f64,
    /// Upper end.
    pub high: f64,
}

impl Proportion {
    /// k of n with its 95% interval ([`clopper_pearson`]).
    pub fn of(k: u64, n: u64) -> Proportion {
        let (low, high) = clopper_pearson(k, n, 0.05);
        Proportion { k, n, rate: if n == 0 { 0.0 } else { k as f64 / n as f64 }, low, high }
    }
}

/// The exact (Clopper–Pearson, 1934) two-sided 1 − `alpha` interval for k successes in n
/// trials: [B(α/2; k, n−k+1), B(1−α/2; k+1, n−k)] with the ends 0 and 1 at k = 0 and k = n.
/// n = 0 gives [0, 1] (nothing is known).
pub fn clopper_pearson(k: u64, n: u64, alpha: f64) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let (k, n) = (k.min(n) as f64, n as f64);
    let low = if k == 0.0 { 0.0 } else { beta_quantile(alpha / 2.0, k, n - k + 1.0) };
    let high = if k == n { 1.0 } else { beta_quantile(1.0 - alpha / 2.0, k + 1.0, n - k) };
    (low, high)
}

/// McNemar's exact test (McNemar, 1947) on the discordant pairs: b frames only the first model
/// got right, c only the second. Two-sided p = min(1, 2 · P[X ≤ min(b, c)]) for X ~ Bin(b + c,
/// 1/2); no discordant pair gives p = 1.
pub fn mcnemar_exact(b: u64, c: u64) -> f64 {
    let n = b + c;
    if n == 0 {
        return 1.0;
    }
    let lo = b.min(c);
    let nf = n as f64;
    let ln_choose = |i: u64| ln_gamma(nf + 1.0) - ln_gamma(i as f64 + 1.0) - ln_gamma((n - i) as f64 + 1.0);
    let tail: f64 = (0..=lo).map(|i| (ln_choose(i) - nf * std::f64::consts::LN_2).exp()).sum();
    (2.0 * tail).min(1.0)
}

/// The bin of `s` in [0, 1] among `bins` equal-width bins that are closed on the right, (i/bins,
/// (i+1)/bins], with 0 in the first: ceil(s · bins) − 1 puts s = i/bins at the top of bin i − 1.
pub fn right_closed_bin(s: f64, bins: usize) -> usize {
    ((s * bins as f64).ceil() as usize).saturating_sub(1).min(bins.max(1) - 1)
}

/// Expected calibration error of the top score over `bins` equal-width bins of [0, 1]: bin i
/// holds scores in (i/bins, (i+1)/bins], with 0 in the first; ECE = Σ (n_i / n) · |acc_i −
/// conf_i| (Guo et al., 2017). Also returns each bin's (count, accuracy, mean confidence) for
/// the reliability diagram. `tops` are (top score, top-1 correct) pairs.
pub fn calibration(tops: &[(f32, bool)], bins: usize) -> (f64, Vec<Bin>) {
    let mut acc = vec![(0u64, 0u64, 0.0f64); bins];
    for &(score, right) in tops {
        let s = f64::from(score).clamp(0.0, 1.0);
        let i = right_closed_bin(s, bins);
        acc[i].0 += 1;
        acc[i].1 += u64::from(right);
        acc[i].2 += s;
    }
    let n = tops.len().max(1) as f64;
    let mut ece = 0.0;
    let out = acc
        .iter()
        .enumerate()
        .map(|(i, &(count, right, conf))| {
            let (accuracy, confidence) =
                if count == 0 { (0.0, 0.0) } else { (right as f64 / count as f64, conf / count as f64) };
            ece += count as f64 / n * (accuracy - confidence).abs();
            Bin { low: i as f64 / bins as f64, high: (i + 1) as f64 / bins as f64, count, accuracy, confidence }
        })
        .collect();
    (ece, out)
}

/// One bin of the reliability diagram.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Bin {
    /// Lower edge (exclusive, except 0).
    pub low: f64,
    /// Upper edge (inclusive).
    pub high: f64,
    /// Frames whose top score falls in the bin.
    pub count: u64,
    /// Share of them whose top label was right.
    pub accuracy: f64,
    /// Their mean top score.
    pub confidence: f64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gamma_and_beta_hit_closed_forms() {
        // Γ(n) = (n−1)! and Γ(1/2) = √π (exact identities).
        assert!((ln_gamma(10.0) - 362_880f64.ln()).abs() < 1e-12);
        assert!((ln_gamma(0.5) - std::f64::consts::PI.sqrt().ln()).abs() < 1e-12);
        // I_x(1, 1) = x; I_x(a, 1) = x^a; I_x(1, b) = 1 − (1−x)^b (exact identities).
        for x in [0.01, 0.3, 0.5, 0.77, 0.999] {
            assert!((inc_beta(x, 1.0, 1.0) - x).abs() < 1e-12);
            assert!((inc_beta(x, 3.5, 1.0) - x.powf(3.5)).abs() < 1e-12);
            assert!((inc_beta(x, 1.0, 4.0) - (1.0 - (1.0 - x).powi(4))).abs() < 1e-12);
        }
    }

    #[test]
    fn clopper_pearson_at_the_ends_has_closed_forms() {
        // k = 0: upper = 1 − (α/2)^(1/n); k = n: lower = (α/2)^(1/n) (exact identities).
        let (lo, hi) = clopper_pearson(0, 20, 0.05);
        assert_eq!(lo, 0.0);
        assert!((hi - (1.0 - 0.025f64.powf(1.0 / 20.0))).abs() < 1e-10);
        let (lo, hi) = clopper_pearson(20, 20, 0.05);
        assert_eq!(hi, 1.0);
        assert!((lo - 0.025f64.powf(1.0 / 20.0)).abs() < 1e-10);
        assert_eq!(clopper_pearson(0, 0, 0.05), (0.0, 1.0));
    }

    #[test]
    fn mcnemar_small_cases_by_hand() {
        // b + c = 2, min 0: 2 · (1/4) = 0.5; b + c = 5 all one way: 2 / 32.
        assert!((mcnemar_exact(2, 0) - 0.5).abs() < 1e-12);
        assert!((mcnemar_exact(0, 5) - 2.0 / 32.0).abs() < 1e-12);
        assert_eq!(mcnemar_exact(0, 0), 1.0);
        assert_eq!(mcnemar_exact(3, 3), 1.0);
    }

    #[test]
    fn calibration_bins_are_right_closed() {
        // With 4 bins (edges exact in binary): 0.25 is the top of bin 0, 0 joins bin 0, 0.5 is
        // the top of bin 1, 1 the top of the last.
        let (_, bins) = calibration(&[(0.0, true), (0.25, true), (0.5, true), (1.0, false)], 4);
        assert_eq!(bins.iter().map(|b| b.count).collect::<Vec<_>>(), [2, 1, 0, 1]);
        // All right at confidence 1: ECE 0. Half right at 1: 0.5.
        assert!(calibration(&[(1.0, true); 4], 15).0.abs() < 1e-12);
        assert!((calibration(&[(1.0, true), (1.0, false)], 15).0 - 0.5).abs() < 1e-12);
    }
}
