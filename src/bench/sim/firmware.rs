//! Simulated firmware changes: what a new firmware does differently from the factory one, so
//! that a regression comparison can be rehearsed without hardware.
//!
//! Written on the command line as `VERSION[,KEY=VALUE...]`, for example
//! `2.2.0,current=+0.4%@2A,phase=+0.15deg,noise=0.05%`:
//! - `current=±X%[@THRESHOLD]` — the current channel's gain moves by X %, at and above the
//!   threshold current when one is given (a changed range switch);
//! - `voltage=±X%` — the voltage channel's gain moves by X %;
//! - `phase=±Xdeg` — the phase compensation moves by X degrees (power at a low power factor
//!   shifts, at unity it hardly does);
//! - `noise=X%` — the front end gets X % more relative noise on every rms reading.
//!
//! A version alone changes only what the meters report as their firmware.

use crate::plan::units::{self, Dimension};

/// What a simulated firmware does differently from the factory one.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct FirmwareChange {
    pub version: Option<String>,
    /// (threshold A, relative gain step) applied to currents at or above the threshold.
    pub gain_step_above: Option<(f64, f64)>,
    /// Relative gain step of the voltage channel.
    pub voltage_gain_step: f64,
    /// Degrees added to every meter's phase error.
    pub phase_shift_deg: f64,
    /// Relative noise added to every rms reading.
    pub extra_noise: f64,
}

/// A firmware description that cannot be read, with what is wrong.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("firmware \"{text}\": {why}")]
pub struct FirmwareSpecError {
    pub text: String,
    pub why: String,
}

impl FirmwareChange {
    /// Reads `VERSION[,KEY=VALUE...]` (see the module's documentation).
    pub fn parse(text: &str) -> Result<FirmwareChange, FirmwareSpecError> {
        let fail = |why: String| FirmwareSpecError {
            text: text.to_string(),
            why,
        };
        let mut parts = text.split(',').map(str::trim);
        let version = parts.next().unwrap_or_default();
        if version.is_empty() || version.contains('=') {
            return Err(fail(
                "start with the version the meters report, as 2.2.0,current=+0.4%".into(),
            ));
        }
        let mut change = FirmwareChange {
            version: Some(version.to_string()),
            ..FirmwareChange::default()
        };
        for part in parts {
            let Some((key, value)) = part.split_once('=') else {
                return Err(fail(format!("\"{part}\" is not KEY=VALUE")));
            };
            let (value, threshold) = match value.split_once('@') {
                Some((v, t)) => (v, Some(t)),
                None => (value, None),
            };
            let percent = |v: &str| -> Result<f64, FirmwareSpecError> {
                let number = v
                    .trim()
                    .strip_suffix('%')
                    .and_then(|n| n.trim().parse::<f64>().ok())
                    .filter(|n| n.is_finite() && n.abs() < 50.0)
                    .ok_or_else(|| {
                        fail(format!(
                            "{key}: \"{v}\" is not a percentage such as +0.4% (below 50 %)"
                        ))
                    })?;
                Ok(number / 100.0)
            };
            if threshold.is_some() && key != "current" {
                return Err(fail(format!("{key}: only current takes a threshold (@)")));
            }
            match key {
                "current" => {
                    let above = match threshold {
                        None => 0.0,
                        Some(t) => units::parse(t, Dimension::Current)
                            .ok()
                            .filter(|a| *a >= 0.0)
                            .ok_or_else(|| {
                                fail(format!("current: \"@{t}\" is not a current such as @2A"))
                            })?,
                    };
                    change.gain_step_above = Some((above, percent(value)?));
                }
                "voltage" => change.voltage_gain_step = percent(value)?,
                "noise" => {
                    change.extra_noise = percent(value)?;
                    if change.extra_noise < 0.0 {
                        return Err(fail(
                            "noise: a firmware adds noise, it cannot take any away".into(),
                        ));
                    }
                }
                "phase" => {
                    change.phase_shift_deg = value
                        .trim()
                        .strip_suffix("deg")
                        .or_else(|| value.trim().strip_suffix('°'))
                        .and_then(|n| n.trim().parse::<f64>().ok())
                        .filter(|n| n.is_finite() && n.abs() <= 10.0)
                        .ok_or_else(|| {
                            fail(format!(
                                "phase: \"{value}\" is not an angle such as +0.15deg (at most 10)"
                            ))
                        })?
                }
                other => {
                    return Err(fail(format!(
                        "no key \"{other}\"; write current, voltage, phase or noise"
                    )));
                }
            }
        }
        Ok(change)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_version_alone_changes_nothing_but_the_version() {
        let f = FirmwareChange::parse("2.2.0").unwrap();
        assert_eq!(f.version.as_deref(), Some("2.2.0"));
        assert_eq!(
            f,
            FirmwareChange {
                version: Some("2.2.0".into()),
                ..FirmwareChange::default()
            }
        );
    }

    #[test]
    fn every_key_is_read() {
        let f = FirmwareChange::parse(
            "3.0.1, current=+0.4%@2 A, voltage=-0.1%, phase=+0.15deg, noise=0.05%",
        )
        .unwrap();
        let (above, step) = f.gain_step_above.unwrap();
        assert_eq!(above, 2.0);
        assert!((step - 0.004).abs() < 1e-12);
        assert!((f.voltage_gain_step + 0.001).abs() < 1e-12);
        assert!((f.phase_shift_deg - 0.15).abs() < 1e-12);
        assert!((f.extra_noise - 0.0005).abs() < 1e-12);
        // No threshold: every current.
        assert_eq!(
            FirmwareChange::parse("3,current=-1%")
                .unwrap()
                .gain_step_above,
            Some((0.0, -0.01))
        );
    }

    #[test]
    fn mistakes_say_what_is_wrong() {
        for (text, says) in [
            ("", "start with the version"),
            ("current=+1%", "start with the version"),
            ("2.2,gain=1%", "no key \"gain\""),
            ("2.2,current=1", "not a percentage"),
            ("2.2,current=+1%@two", "not a current"),
            ("2.2,phase=1rad", "not an angle"),
            ("2.2,voltage=+1%@2A", "only current takes a threshold"),
            ("2.2,noise=-1%", "cannot take any away"),
            ("2.2,current", "not KEY=VALUE"),
        ] {
            let e = FirmwareChange::parse(text).unwrap_err().to_string();
            assert!(e.contains(says), "{text}: {e}");
        }
    }
}
