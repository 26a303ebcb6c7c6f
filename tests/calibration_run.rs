//! Calibration steps: fit, write-back, read-back and verification, on the simulated bench and
//! through the text link over pseudo-terminals.

mod common;
use common::ctx;

use meterproof::bench::sim::device::{Device, Faults, PtyDevice};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::link::text;
use meterproof::plan::{LinkSpec, Plan};
use meterproof::record::{CalibrationStatus, UnitRecord, UnitStatus};
use std::sync::Arc;

fn plan(name: &str) -> Plan {
    Plan::load(std::path::Path::new(&format!("test-plans/{name}"))).unwrap()
}

fn config() -> SimConfig {
    SimConfig {
        plant_defect: false,
        ..SimConfig::new(1, 6)
    }
}

/// Mean |error| of the verification steps' current checks, percent.
fn verification_error(r: &UnitRecord) -> f64 {
    let errors: Vec<f64> = r
        .steps
        .iter()
        .filter(|s| s.id.starts_with("verify"))
        .flat_map(|s| &s.checks)
        .map(|c| c.evaluation.as_ref().unwrap().error.abs())
        .collect();
    errors.iter().sum::<f64>() / errors.len() as f64
}

#[test]
fn calibration_written_back_brings_every_unit_within_limits() {
    let with_write = plan("calibrate.yaml");
    let text = std::fs::read_to_string("test-plans/calibrate.yaml").unwrap();
    let fit_only = Plan::from_text(
        "fit-only.yaml",
        &text.replace(
            "  write: { offset: offset_current, gain: gain_current }\n",
            "",
        ),
    )
    .unwrap();
    let calibrated = exec::run(
        &with_write,
        &mut SimBench::new(&config()).into_bench(),
        &ctx(),
        &mut Silent,
    );
    let uncalibrated = exec::run(
        &fit_only,
        &mut SimBench::new(&config()).into_bench(),
        &ctx(),
        &mut Silent,
    );
    for (c, u) in calibrated.iter().zip(&uncalibrated) {
        assert_eq!(
            c.verdict.status,
            UnitStatus::Accepted,
            "{}: {:?}",
            c.serial,
            c.verdict
        );
        let cal = c.calibration.as_ref().unwrap();
        assert_eq!(cal.status, CalibrationStatus::Written);
        // The constants before are the front end's nominal ones; those read back are those written.
        assert_eq!(cal.before, Some((128.0, 2240.0)));
        assert_eq!(cal.read_back, cal.written);
        let fit = cal.result.as_ref().unwrap();
        assert_eq!(fit.points.len(), 4);
        assert_eq!(fit.fit.residuals.len(), 4);
        assert!(fit.linearity_error_percent < 0.1);
        assert_eq!(
            u.calibration.as_ref().unwrap().status,
            CalibrationStatus::Fitted
        );
        // After the write, a verification reading's resolution is one count at the gain
        // written (GUM F.2.2.1: δ/√12), not at the nominal gain.
        let (_, gain) = cal.written.unwrap();
        let verify = c.steps.iter().find(|s| s.id == "verify-5A").unwrap();
        let check = &verify.checks[0];
        let term = check
            .uncertainty
            .as_ref()
            .unwrap()
            .components
            .iter()
            .find(|x| x.name == "resolution of the unit's reading")
            .unwrap();
        let c_unit = 100.0 / check.reference.unwrap();
        let expected = (1.0 / gain.abs()) / 12f64.sqrt() * c_unit;
        assert!(
            (term.u - expected).abs() < 1e-12 * expected,
            "{} vs {expected}",
            term.u
        );
        // The new constants reduce the error the verification steps see.
        assert!(
            verification_error(c) < verification_error(u),
            "{}",
            c.serial
        );
    }
    // Without write-back, the unit with the largest gain error fails its ±0.2 % verification.
    assert!(
        uncalibrated
            .iter()
            .any(|r| r.verdict.status == UnitStatus::Rejected)
    );
}

/// The serial calibration plan over pseudo-terminals; `faults[i]` for meter i.
fn serial_run(faults: &[Faults]) -> Vec<UnitRecord> {
    let p = plan("calibrate-serial.yaml");
    let LinkSpec::Text(spec) = &p.link else {
        panic!()
    };
    let spec = Arc::new((**spec).clone());
    let sim = SimBench::new(&config());
    let devices: Vec<PtyDevice> = (0..sim.positions())
        .map(|i| {
            PtyDevice::spawn(Device::new(
                sim.meter(i),
                faults.get(i).cloned().unwrap_or_default(),
            ))
            .unwrap()
        })
        .collect();
    let mut bench = sim.into_bench();
    for (pos, d) in bench.positions.iter_mut().zip(&devices) {
        pos.link = text::open(&d.path, spec.clone()).unwrap();
    }
    bench.parallel = true;
    exec::run(&p, &mut bench, &ctx(), &mut Silent)
}

#[test]
fn calibration_over_serial_writes_reads_back_and_refuses_constants_that_did_not_take() {
    let faults = [
        Faults::default(),
        Faults {
            ignore_writes: true,
            ..Faults::default()
        },
    ];
    let records = serial_run(&faults);
    let good = &records[0];
    assert_eq!(
        good.verdict.status,
        UnitStatus::Accepted,
        "{:?}",
        good.verdict
    );
    let cal = good.calibration.as_ref().unwrap();
    assert_eq!(cal.status, CalibrationStatus::Written);
    assert_eq!(
        cal.read_back, cal.written,
        "the shortest f64 text reads back exactly"
    );

    let stubborn = &records[1];
    assert_eq!(stubborn.verdict.status, UnitStatus::Rejected);
    let cal = stubborn.calibration.as_ref().unwrap();
    assert_eq!(cal.status, CalibrationStatus::Mismatch);
    assert_eq!(
        cal.read_back,
        Some((128.0, 2240.0)),
        "the nominal constants stayed"
    );
    assert!(
        stubborn.verdict.reasons[0].contains("was not tested further"),
        "{:?}",
        stubborn.verdict
    );
    assert!(
        !stubborn.steps.iter().any(|s| s.id.starts_with("verify")),
        "no verification ran"
    );
    // The other units were calibrated and verified as on the built-in bench.
    for r in &records[2..] {
        assert_eq!(
            r.verdict.status,
            UnitStatus::Accepted,
            "{}: {:?}",
            r.serial,
            r.verdict
        );
    }
}

/// The calibration plan over one simulated Modbus bus, every unit at its position number.
fn modbus_run(faults: &[Faults]) -> Vec<UnitRecord> {
    use meterproof::bench::sim::modbus_device::{self, BusUnit, ModbusBus};
    use meterproof::link::modbus::{Bus, ModbusLink};
    let p = plan("calibrate-modbus.yaml");
    let LinkSpec::Modbus(spec) = &p.link else {
        panic!()
    };
    let spec = Arc::new((**spec).clone());
    let sim = SimBench::new(&config());
    let units = (0..sim.positions())
        .map(|i| {
            let f = faults.get(i).cloned().unwrap_or_default();
            BusUnit::new((i + 1) as u8, sim.meter(i), f)
        })
        .collect();
    let device = modbus_device::spawn(ModbusBus { units }).unwrap();
    let bus = Bus::open(&device.path, &spec).unwrap();
    let mut bench = sim.into_bench();
    for (i, pos) in bench.positions.iter_mut().enumerate() {
        pos.link = Box::new(ModbusLink::new(bus.clone(), (i + 1) as u8, spec.clone()));
    }
    bench.parallel = true;
    exec::run(&p, &mut bench, &ctx(), &mut Silent)
}

/// Constants go to holding registers as f64 with function 16 and come back from them
/// bit for bit; a unit that acknowledges a write but keeps its old constants is caught by the
/// read-back, on a bus as over a console.
#[test]
fn calibration_over_modbus_writes_registers_and_reads_them_back() {
    let faults = [
        Faults::default(),
        Faults {
            ignore_writes: true,
            ..Faults::default()
        },
    ];
    let over_bus = modbus_run(&faults);
    let over_console = serial_run(&faults);
    for (b, c) in over_bus.iter().zip(&over_console) {
        assert_eq!(
            b.verdict.status, c.verdict.status,
            "{}: {:?} {:?}",
            b.serial, b.verdict, b.calibration
        );
        let (cb, cc) = (
            b.calibration.as_ref().unwrap(),
            c.calibration.as_ref().unwrap(),
        );
        assert_eq!(cb.status, cc.status, "{}", b.serial);
    }
    let good = over_bus[0].calibration.as_ref().unwrap();
    assert_eq!(good.status, CalibrationStatus::Written);
    assert_eq!(
        good.read_back, good.written,
        "an f64 register reads back exactly"
    );
    let stubborn = over_bus[1].calibration.as_ref().unwrap();
    assert_eq!(stubborn.status, CalibrationStatus::Mismatch);
    assert_eq!(stubborn.read_back, Some((128.0, 2240.0)));
}

#[test]
fn calibration_mistakes_in_a_plan_are_refused() {
    let text = std::fs::read_to_string("test-plans/calibrate-serial.yaml").unwrap();
    let missing = text.replace(
        "points: [cal-0A, cal-1.2A, cal-2.4A, cal-3.6A]",
        "points: [cal-0A, cal-9A, cal-2.4A]",
    );
    let e = Plan::from_text("c.yaml", &missing).unwrap_err().to_string();
    assert!(
        e.contains("calibration.points[2]: no step has the id \"cal-9A\""),
        "{e}"
    );
    assert!(e.contains("needs at least 3 points"), "{e}");
    let no_readback = text.replace(
        "      readback: { request: \"rg I {channel}\", reply: '^= rg I \\S+ (?P<value>\\S+)$' }\n",
        "",
    );
    assert_ne!(no_readback, text);
    let e = Plan::from_text("c.yaml", &no_readback)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("calibration.write.gain: the link's write \"gain_current\" has no readback"),
        "{e}"
    );
    let quadratic = text.replace("fit: line", "fit: quadratic");
    let e = Plan::from_text("c.yaml", &quadratic)
        .unwrap_err()
        .to_string();
    assert!(e.contains("write-back needs fit: line"), "{e}");
}

/// A calibration outside the plan's limits rejects the unit with the reason and writes nothing
/// (a front end far from its design gain has a fault that constants would hide). The window is
/// ±0.05 % around 2240 counts/A, i.e. ±1.12 counts/A; each unit's fitted gain is recomputed
/// here from its recorded points by least squares (the line through the points, by hand).
#[test]
fn a_calibration_outside_its_limits_rejects_the_unit_and_writes_nothing() {
    let text = std::fs::read_to_string("test-plans/calibrate.yaml").unwrap();
    let tight = Plan::from_text(
        "tight.yaml",
        &text.replace(
            "gain: { nominal: 2240, within: 3 % }",
            "gain: { nominal: 2240, within: 0.05 % }",
        ),
    )
    .unwrap();
    assert!(tight.source.text.contains("0.05 %"));
    let records = exec::run(
        &tight,
        &mut SimBench::new(&config()).into_bench(),
        &ctx(),
        &mut Silent,
    );
    let mut rejected = 0;
    for r in &records {
        let cal = r.calibration.as_ref().unwrap();
        let points = &cal.result.as_ref().unwrap().points;
        let n = points.len() as f64;
        let (mx, my) = (
            points.iter().map(|p| p.reference).sum::<f64>() / n,
            points.iter().map(|p| p.counts).sum::<f64>() / n,
        );
        let sxy: f64 = points
            .iter()
            .map(|p| (p.reference - mx) * (p.counts - my))
            .sum();
        let sxx: f64 = points.iter().map(|p| (p.reference - mx).powi(2)).sum();
        let gain = sxy / sxx;
        let outside = (gain - 2240.0).abs() > 1.12;
        let limit = cal.limits.iter().find(|l| l.what == "gain").unwrap();
        assert!((limit.value - gain).abs() < 1e-6 * gain);
        assert_eq!(limit.within, !outside);
        if outside {
            rejected += 1;
            assert_eq!(cal.status, CalibrationStatus::OutsideLimits);
            assert_eq!(cal.written, None, "nothing written");
            assert_eq!(r.verdict.status, UnitStatus::Rejected);
            let reason = r.verdict.reasons.join("; ");
            assert!(
                reason.contains("gain") && reason.contains("from nominal 2240"),
                "{reason}"
            );
            assert!(
                r.steps.iter().all(|s| !s.id.starts_with("verify")
                    || s.checks.iter().all(|c| c.evaluation.is_none())),
                "not tested further"
            );
        } else {
            assert_eq!(cal.status, CalibrationStatus::Written);
        }
    }
    assert!(
        rejected >= 1 && rejected < records.len(),
        "{rejected} of {}",
        records.len()
    );
    // The lot summary counts them by limit, among the rejections.
    let lot = meterproof::report::summary::LotSummary::of("lot", &records, &|_| String::new());
    let gain = lot
        .calibration
        .iter()
        .find(|c| c.what == "current gain")
        .unwrap();
    assert_eq!((gain.units, gain.outside), (records.len(), rejected));
    assert!(
        lot.rejections
            .iter()
            .any(|(what, n)| what == "calibration current gain" && *n == rejected)
    );
    // The unit's CSV has a row per calibration limit with its verdict.
    let csv = String::from_utf8(meterproof::report::unit_csv(&records[0]).unwrap()).unwrap();
    let rows: Vec<&str> = csv
        .lines()
        .filter(|l| l.contains(",calibration,"))
        .collect();
    assert_eq!(rows.len(), 4, "{csv}");
    assert!(rows.iter().any(|r| r.contains("current gain")));
}
