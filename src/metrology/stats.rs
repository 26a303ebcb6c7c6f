//! Mean and standard deviation of a sample series.

use serde::{Deserialize, Serialize};

/// Count, mean and sample standard deviation (n − 1) of a series.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    pub count: usize,
    pub mean: f64,
    /// Sample standard deviation with n − 1; absent for fewer than two values.
    pub std_dev: Option<f64>,
}

impl Summary {
    /// Summarises `values` in two passes: the mean first, then the squared deviations from it
    /// with the rounding of the mean corrected (the "corrected two-pass" form, Chan, Golub and
    /// LeVeque 1983), which keeps its digits when the values differ only far to the right of the
    /// decimal point, where a one-pass Σx² loses them all.
    pub fn of(values: &[f64]) -> Option<Summary> {
        if values.is_empty() {
            return None;
        }
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let (sum_sq, sum_dev) = values.iter().fold((0.0, 0.0), |(sq, dev), &x| {
            let d = x - mean;
            (sq + d * d, dev + d)
        });
        let std_dev = (values.len() > 1).then(|| {
            ((sum_sq - sum_dev * sum_dev / n) / (n - 1.0))
                .max(0.0)
                .sqrt()
        });
        // The plain mean can be off by the rounding of the sum; the mean deviation corrects it.
        let mean = mean + sum_dev / n;
        Some(Summary {
            count: values.len(),
            mean,
            std_dev,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Reads a NIST StRD univariate file: values from line 61 on (the header says so).
    fn strd(text: &str) -> Vec<f64> {
        text.lines()
            .skip(60)
            .filter_map(|l| l.trim().parse().ok())
            .collect()
    }

    /// LRE = −log10(|computed − certified| / |certified|): NIST's figure of agreement.
    fn lre(computed: f64, certified: f64) -> f64 {
        if computed == certified {
            return 15.0;
        }
        -((computed - certified).abs() / certified.abs()).log10()
    }

    fn check(file: &str, mean: f64, sd: f64, min_lre: f64) {
        let s = Summary::of(&strd(file)).unwrap();
        assert!(lre(s.mean, mean) >= 9.0, "mean {} vs {}", s.mean, mean);
        let got = s.std_dev.unwrap();
        assert!(
            lre(got, sd) >= min_lre,
            "sd {got} vs {sd}: LRE {}",
            lre(got, sd)
        );
    }

    /// NIST StRD univariate datasets, certified values (tests/data/README.md).
    #[test]
    fn nist_strd_numacc1_to_4() {
        let data = |name: &str| match name {
            "NumAcc1" => include_str!("../../tests/data/nist-strd/NumAcc1.dat"),
            "NumAcc2" => include_str!("../../tests/data/nist-strd/NumAcc2.dat"),
            "NumAcc3" => include_str!("../../tests/data/nist-strd/NumAcc3.dat"),
            _ => include_str!("../../tests/data/nist-strd/NumAcc4.dat"),
        };
        check(data("NumAcc1"), 10000002.0, 1.0, 9.0);
        check(data("NumAcc2"), 1.2, 0.1, 9.0);
        check(data("NumAcc3"), 1000000.2, 0.1, 9.0);
        // NumAcc4's values (10000000.2 and its neighbours) are not representable in binary: the
        // spacing of doubles there is 1.9e-9, which alone moves s by about 1e-8 relative. An
        // LRE of 8 is what the data allow in double precision.
        check(data("NumAcc4"), 10000000.2, 0.1, 8.0);
    }

    /// The one-pass Σx² formula that the two-pass form replaces fails NumAcc4 outright: this is
    /// what the dataset is for, and shows the test above can fail.
    #[test]
    fn a_one_pass_variance_fails_numacc4() {
        let v = strd(include_str!("../../tests/data/nist-strd/NumAcc4.dat"));
        let n = v.len() as f64;
        let (s1, s2) = v.iter().fold((0.0, 0.0), |(a, b), x| (a + x, b + x * x));
        let naive = ((s2 - s1 * s1 / n) / (n - 1.0)).max(0.0).sqrt();
        assert!(lre(naive, 0.1) < 4.0, "naive {naive}");
    }

    /// NIST StRD Michelso (observed data), certified mean 299.8524, sd 0.0790105478190518.
    #[test]
    fn nist_strd_michelson() {
        check(
            include_str!("../../tests/data/nist-strd/Michelso.dat"),
            299.8524,
            0.0790105478190518,
            9.0,
        );
    }

    #[test]
    fn one_value_has_no_spread_and_none_has_no_summary() {
        let s = Summary::of(&[4.0]).unwrap();
        assert_eq!((s.count, s.mean, s.std_dev), (1, 4.0, None));
        assert!(Summary::of(&[]).is_none());
    }
}
