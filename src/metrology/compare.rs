//! Two-sample comparisons for regression checks: Welch's unequal-variance t-test, the paired
//! t-test, and the equivalence test by two one-sided tests (TOST).

use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

/// A difference of means with its standard error and test.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Shift {
    /// Mean of the candidate minus mean of the baseline (for paired data, mean of differences).
    pub shift: f64,
    pub std_error: f64,
    pub dof: f64,
    pub t: f64,
    /// Two-sided p-value of "no shift".
    pub p: f64,
    pub paired: bool,
}

fn mean_var(x: &[f64]) -> (f64, f64) {
    let s = super::Summary::of(x).expect("samples");
    (s.mean, s.std_dev.map_or(0.0, |sd| sd * sd))
}

fn two_sided(t: f64, dof: f64) -> f64 {
    match StudentsT::new(0.0, 1.0, dof) {
        Ok(d) => 2.0 * d.sf(t.abs()),
        Err(_) => f64::NAN,
    }
}

fn upper_tail(t: f64, dof: f64) -> f64 {
    StudentsT::new(0.0, 1.0, dof).map_or(f64::NAN, |d| d.sf(t))
}

/// Welch's t-test of `candidate` against `baseline` (unequal variances, Welch–Satterthwaite ν).
pub fn welch(baseline: &[f64], candidate: &[f64]) -> Option<Shift> {
    if baseline.len() < 2 || candidate.len() < 2 {
        return None;
    }
    let (m1, v1) = mean_var(baseline);
    let (m2, v2) = mean_var(candidate);
    let (n1, n2) = (baseline.len() as f64, candidate.len() as f64);
    let (a, b) = (v1 / n1, v2 / n2);
    let se = (a + b).sqrt();
    if se == 0.0 {
        return None;
    }
    let dof = (a + b).powi(2) / (a * a / (n1 - 1.0) + b * b / (n2 - 1.0));
    let t = (m2 - m1) / se;
    Some(Shift {
        shift: m2 - m1,
        std_error: se,
        dof,
        t,
        p: two_sided(t, dof),
        paired: false,
    })
}

/// Student's two-sample t-test with pooled variance.
pub fn pooled(baseline: &[f64], candidate: &[f64]) -> Option<Shift> {
    if baseline.len() < 2 || candidate.len() < 2 {
        return None;
    }
    let (m1, v1) = mean_var(baseline);
    let (m2, v2) = mean_var(candidate);
    let (n1, n2) = (baseline.len() as f64, candidate.len() as f64);
    let dof = n1 + n2 - 2.0;
    let sp2 = ((n1 - 1.0) * v1 + (n2 - 1.0) * v2) / dof;
    let se = (sp2 * (1.0 / n1 + 1.0 / n2)).sqrt();
    if se == 0.0 {
        return None;
    }
    let t = (m2 - m1) / se;
    Some(Shift {
        shift: m2 - m1,
        std_error: se,
        dof,
        t,
        p: two_sided(t, dof),
        paired: false,
    })
}

/// The paired t-test on differences candidate − baseline, unit by unit.
pub fn paired(differences: &[f64]) -> Option<Shift> {
    if differences.len() < 2 {
        return None;
    }
    let (m, v) = mean_var(differences);
    let n = differences.len() as f64;
    let se = (v / n).sqrt();
    if se == 0.0 {
        return None;
    }
    let dof = n - 1.0;
    let t = m / se;
    Some(Shift {
        shift: m,
        std_error: se,
        dof,
        t,
        p: two_sided(t, dof),
        paired: true,
    })
}

/// Two one-sided tests of |shift| < `margin`: the larger of the two one-sided p-values.
/// Equivalence is shown at level α when this p-value is below α (equivalently, when the
/// (1 − 2α) confidence interval of the shift lies inside ±margin).
pub fn equivalence_p(s: &Shift, margin: f64) -> f64 {
    let lower = upper_tail((s.shift + margin) / s.std_error, s.dof);
    let upper = upper_tail((margin - s.shift) / s.std_error, s.dof);
    lower.max(upper)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// NIST/SEMATECH e-Handbook §1.3.5.3, AUTO83B.DAT (tests/data/nist-ehandbook): U.S. against
    /// Japanese cars' mpg. Welch: t = −12.94627327, ν = 136.8749767, p = 1.571e−25;
    /// pooled: t = −12.62059129, ν = 326.
    #[test]
    fn welch_and_pooled_against_the_nist_handbook() {
        let text = include_str!("../../tests/data/nist-ehandbook/AUTO83B.DAT");
        let mut us = Vec::new();
        let mut japan = Vec::new();
        // Data follow the dashed line under the column headings.
        let data = text.lines().skip_while(|l| !l.starts_with("-----")).skip(1);
        for line in data {
            let cols: Vec<f64> = line
                .split_whitespace()
                .filter_map(|c| c.parse().ok())
                .collect();
            if cols.len() == 2 {
                us.push(cols[0]);
                if cols[1] != -999.0 {
                    japan.push(cols[1]);
                }
            }
        }
        assert_eq!((us.len(), japan.len()), (249, 79));
        // The handbook's t is U.S. − Japan: the baseline here is Japan, the candidate the U.S.
        let w = welch(&japan, &us).unwrap();
        assert!((w.t - (-12.94627327)).abs() < 1e-7, "{}", w.t);
        assert!((w.dof - 136.8749767).abs() < 1e-6, "{}", w.dof);
        assert!((w.p - 1.571e-25).abs() / 1.571e-25 < 0.01, "{}", w.p);
        let p = pooled(&japan, &us).unwrap();
        assert!((p.t - (-12.62059129)).abs() < 1e-7);
        assert_eq!(p.dof, 326.0);
    }

    /// Equivalence tests (TOST) of the R package `equivalence`, as reproduced in a
    /// general-purpose statistics library's tests (tests/data/README.md):
    /// a = [4, 7, 8, 6, 3, 2], b = [6, 8, 7, 10, 11, 9].
    #[test]
    fn equivalence_against_published_values() {
        let a = [4.0, 7.0, 8.0, 6.0, 3.0, 2.0];
        let b = [6.0, 8.0, 7.0, 10.0, 11.0, 9.0];
        let p = pooled(&a, &b).unwrap();
        assert_eq!(p.dof, 10.0);
        assert!((equivalence_p(&p, 1.0) - 0.9650974).abs() < 1e-6);
        assert!((equivalence_p(&p, 10.0) - 0.00017933).abs() < 1e-8);
        let w = welch(&a, &b).unwrap();
        assert!((w.dof - 9.49).abs() < 0.005, "{}", w.dof);
        assert!((equivalence_p(&w, 1.0) - 0.9643479).abs() < 1e-6);
        let d: Vec<f64> = a.iter().zip(&b).map(|(x, y)| x - y).collect();
        let pr = paired(&d).unwrap();
        assert_eq!(pr.dof, 5.0);
        assert!((equivalence_p(&pr, 1.0) - 0.9293826).abs() < 1e-6);
        assert!((equivalence_p(&pr, 2.0) - 0.8286101).abs() < 1e-6);
    }

    #[test]
    fn too_little_data_gives_no_test() {
        assert!(welch(&[1.0], &[1.0, 2.0]).is_none());
        assert!(paired(&[0.5]).is_none());
        assert!(
            paired(&[0.5, 0.5]).is_none(),
            "no spread, no standard error"
        );
    }
}
