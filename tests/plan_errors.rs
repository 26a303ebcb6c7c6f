//! Plan validation: every kind of mistake is refused with its file, line, column and path.

use meterproof::plan::{Plan, PlanErrors};

const GOOD: &str = include_str!("../test-plans/demo.yaml");

fn errors(text: &str) -> PlanErrors {
    Plan::from_text("p.yaml", text).expect_err("the plan should be refused")
}

/// Line (1-based) of the first line containing `needle`.
fn line_of(text: &str, needle: &str) -> usize {
    text.lines()
        .position(|l| l.contains(needle))
        .expect("needle in text")
        + 1
}

#[test]
fn the_demo_plan_is_valid() {
    let plan = Plan::from_text("demo.yaml", GOOD).unwrap();
    assert_eq!(plan.steps.len(), 5);
    assert_eq!(plan.steps[1].load.current, 0.5);
    assert!((plan.steps[4].load.phase_deg - 60.0).abs() < 1e-9);
}

#[test]
fn a_misspelt_key_is_refused_with_its_line_and_column() {
    let text = GOOD.replace("load: { current: 500 mA }", "load: { curent: 500 mA }");
    let e = errors(&text);
    let first = &e.0[0];
    assert_eq!(first.path, "steps[1].load.curent");
    assert!(
        first.message.contains("unknown field `curent`"),
        "{}",
        first.message
    );
    let line = line_of(&text, "curent");
    let column = text.lines().nth(line - 1).unwrap().find("curent").unwrap() + 1;
    let pos = first.position.expect("a position");
    assert_eq!((pos.line, pos.column), (line, column));
    assert!(
        e.to_string()
            .starts_with(&format!("p.yaml:{line}:{column}: steps[2].load.curent: "))
    );
}

#[test]
fn a_value_of_the_wrong_dimension_names_what_was_expected() {
    let text = GOOD.replace("load: { current: 5 A }", "load: { current: 5 V }");
    let e = errors(&text);
    assert_eq!(e.0.len(), 1, "{e}");
    assert_eq!(e.0[0].path, "steps[2].load.current");
    assert_eq!(
        e.0[0].message,
        "expected a current such as \"5 A\", but \"5 V\" is a voltage"
    );
    assert_eq!(e.0[0].position.unwrap().line, line_of(&text, "5 V"));
}

#[test]
fn several_mistakes_are_reported_in_one_pass() {
    let text = GOOD
        .replace("settle: 2 s", "settle: 2 parsecs")
        .replace(
            "{ quantity: voltage, tolerance: { percent: 0.5 % } }",
            "{ quantity: voltage, tolerance: { percent: 0.5 A } }",
        )
        .replace("quantity: frequency", "quantity: frequence");
    let e = errors(&text);
    let paths: Vec<&str> = e.0.iter().map(|x| x.path.as_str()).collect();
    assert!(paths.contains(&"steps[0].settle"), "{e}");
    assert!(
        paths.contains(&"steps[2].checks[0].tolerance.percent"),
        "{e}"
    );
    assert!(paths.contains(&"steps[2].checks[3].quantity"), "{e}");
    // Reported in file order.
    let lines: Vec<usize> = e.0.iter().map(|x| x.position.unwrap().line).collect();
    assert!(lines.windows(2).all(|w| w[0] <= w[1]), "{lines:?}");
}

#[test]
fn structural_mistakes_in_different_steps_all_show() {
    let text = GOOD
        .replace("load: { current: 500 mA }", "lod: { current: 500 mA }")
        .replace("samples: 11", "sample: 11");
    let e = errors(&text);
    let paths: Vec<&str> = e.0.iter().map(|x| x.path.as_str()).collect();
    assert!(paths.contains(&"steps[1].lod"), "{e}");
    assert!(paths.contains(&"steps[3].sample"), "{e}");
}

#[test]
fn yaml_syntax_errors_carry_a_position() {
    let e = errors("id: x\nsteps: [\n  - a\n");
    assert!(e.0[0].message.starts_with("not valid YAML"), "{e}");
    assert!(e.0[0].position.is_some());
}

#[test]
fn a_relative_tolerance_at_zero_load_is_refused() {
    let text = GOOD.replace(
        "tolerance: { at_most: 0.5 W }",
        "tolerance: { percent: 1 % }",
    );
    let e = errors(&text);
    assert_eq!(e.0[0].path, "steps[0].checks[0].tolerance");
    assert!(e.0[0].message.contains("non-zero reference"), "{e}");
}

#[test]
fn cross_checks_between_fields() {
    let over = GOOD.replace("current: 16 A }", "current: 20 A }");
    assert!(
        errors(&over)
            .to_string()
            .contains("exceeds the plan's max_current of 16 A")
    );

    let dup = GOOD.replace("id: max-Imax", "id: basic-Ib");
    assert!(
        errors(&dup)
            .to_string()
            .contains("step id \"basic-Ib\" is used twice")
    );

    let pattern = GOOD.replace(r"'^2\.1\.\d+$'", "'^2\\.(1'");
    let e = errors(&pattern);
    assert_eq!(e.0[0].path, "product.firmware");

    let channel = GOOD.replace(
        "{ quantity: voltage, tolerance",
        "{ quantity: voltage, channel: L2, tolerance",
    );
    assert!(
        errors(&channel)
            .to_string()
            .contains("unknown channel \"L2\"")
    );

    let both = GOOD.replace(
        "power_factor: 0.5 inductive",
        "power_factor: 0.5 inductive, phase: 60 deg",
    );
    assert!(errors(&both).to_string().contains("not both"));

    let pf = GOOD.replace("power_factor: 0.5 inductive", "power_factor: 0.5");
    assert!(
        errors(&pf)
            .to_string()
            .contains("does not say inductive or capacitive")
    );

    let tol = GOOD.replace("{ within: 0.05 Hz }", "{ within: 0.05 Hz, at_most: 1 Hz }");
    assert!(errors(&tol).to_string().contains("a tolerance is one of"));

    let kind = GOOD.replace("kind: sim", "kind: carrier-pigeon");
    assert!(
        errors(&kind).0[0]
            .message
            .contains("unknown variant `carrier-pigeon`")
    );
}

#[test]
fn a_bare_number_needs_its_unit() {
    let text = GOOD.replace("nominal_voltage: 230 V", "nominal_voltage: 230");
    let e = errors(&text);
    assert_eq!(e.0[0].path, "ratings.nominal_voltage");
    assert!(e.0[0].message.contains("has no unit"), "{e}");
}

#[test]
fn the_plan_hash_is_of_the_exact_text() {
    let a = Plan::from_text("a", GOOD).unwrap();
    let b = Plan::from_text("a", &format!("{GOOD}\n# a comment\n")).unwrap();
    assert_eq!(a.source.sha256.len(), 64);
    assert_ne!(a.source.sha256, b.source.sha256);
}

#[test]
fn class_tolerances_resolve_from_the_tables_or_are_refused() {
    let plan = Plan::from_text("p.yaml", GOOD).unwrap();
    // basic-pf0.5 active power: IEC 62053-21 class 1 at 0.2 Ib ≤ I ≤ Imax, 0.5 inductive: ±1.0 %
    // (from memory, as the class data says).
    match &plan.steps[4].checks[1].tolerance {
        meterproof::plan::Tolerance::Class { percent, basis } => {
            assert_eq!(*percent, 1.0);
            assert!(
                basis.contains("0.2 Ib ≤ I ≤ Imax at PF 0.5i/0.8c"),
                "{basis}"
            );
        }
        other => panic!("{other:?}"),
    }
    // A load point the table does not cover: 0.02 Ib.
    let low = GOOD.replace("load: { current: 500 mA }", "load: { current: 100 mA }");
    let e = errors(&low);
    assert_eq!(e.0[0].path, "steps[1].checks[1].tolerance.class");
    assert!(
        e.0[0].message.contains("class 1 has no limit at 0.1 A"),
        "{e}"
    );
    // A power factor the table does not cover.
    let pf = GOOD.replace("power_factor: 0.5 inductive", "power_factor: 0.7 inductive");
    assert!(errors(&pf).to_string().contains("has no limit"));
    // A class applies to power and energy, not to current.
    let current = GOOD.replace(
        "{ quantity: current, tolerance: { percent: 0.5 % } }",
        "{ quantity: current, tolerance: { class: true } }",
    );
    assert!(errors(&current).to_string().contains("not for current"));
    // An unknown class.
    let unknown = GOOD.replace("class: \"1\"", "class: \"0.7\"");
    assert!(errors(&unknown).to_string().contains("known: 1, 2"));
    // Reactive power needs a reactive class.
    let last = GOOD.rfind("quantity: active_power").unwrap();
    let reactive = format!(
        "{}quantity: reactive_power{}",
        &GOOD[..last],
        &GOOD[last + "quantity: active_power".len()..]
    );
    assert!(
        errors(&reactive).to_string().contains("reactive_class"),
        "{}",
        errors(&reactive)
    );
}

#[test]
fn decision_rules_and_special_tests_are_checked() {
    let bad = GOOD.replace("guard_band: 1 U", "guard_band: 1 %");
    assert_eq!(errors(&bad).0[0].path, "decision.guard_band");
    let bad = GOOD.replace("rule: guarded", "rule: lenient");
    assert!(
        errors(&bad)
            .to_string()
            .contains("unknown decision rule \"lenient\"")
    );
    let no_constant = GOOD
        .replace("  meter_constant: 1000 imp/kWh\n", "")
        .replace(
            "  - id: no-load\n    description: Voltage applied, no current; nothing may register\n",
            "  - id: no-load\n    special: no_load\n",
        );
    assert!(
        errors(&no_constant)
            .to_string()
            .contains("needs ratings.meter_constant"),
        "{}",
        errors(&no_constant)
    );
    let bad_constant = GOOD.replace("1000 imp/kWh", "1000 pulses");
    assert_eq!(errors(&bad_constant).0[0].path, "ratings.meter_constant");
}

#[test]
fn mistakes_are_said_in_the_plans_words_not_the_programs() {
    for (text, expected) in [
        ("- a\n- b\n", "expected a mapping of keys and values"),
        (
            &*GOOD.replace("    load: { current: 500 mA }", "    load: 5"),
            "steps[2].load: invalid type: integer `5`, expected a mapping of keys and values",
        ),
    ] {
        let e = errors(text).to_string();
        assert!(e.contains(expected), "{e}");
        for internal in ["Raw", "struct", "u128", "u32", "usize", "f64", "enum"] {
            assert!(!e.contains(internal), "{internal} in: {e}");
        }
    }
}

#[test]
fn a_mistake_in_the_defaults_is_said_once_at_the_defaults() {
    let text = GOOD.replace(
        "  settle: 4 s\n",
        "  settle: 4 s\n  settle_until: { stable_within: 0.3 %, readings: 40, every: 1 s, at_most: 4 s }\n",
    );
    let e = errors(&text);
    let said: Vec<String> = e.0.iter().map(|x| x.to_string()).collect();
    assert_eq!(
        said.len(),
        1,
        "inherited by every step, said once: {said:#?}"
    );
    let line = line_of(&text, "settle_until");
    assert!(
        said[0].starts_with(&format!("p.yaml:{line}:"))
            && said[0].contains("defaults.settle_until"),
        "{}",
        said[0]
    );
}

#[test]
fn a_plan_with_thousands_of_mistakes_prints_the_first_and_counts_the_rest() {
    let (head, _) = GOOD.split_once("steps:").unwrap();
    let mut text = format!("{head}steps:\n");
    for i in 0..300 {
        text.push_str(&format!(
            "  - id: s{i}\n    load: {{ current: 5 A }}\n    checks:\n      - {{ quantity: current, tolerance: {{ precent: 1 % }} }}\n"
        ));
    }
    let e = errors(&text);
    assert_eq!(e.0.len(), 300, "every mistake is kept");
    let shown = e.to_string();
    let lines: Vec<&str> = shown.lines().collect();
    assert_eq!(lines.len(), 51, "{shown}");
    assert_eq!(
        *lines.last().unwrap(),
        "... and 250 more mistakes (the first 50 are shown)"
    );
    // In file order, each at its own line, the first step counted as step 1.
    assert!(
        lines[0].contains("steps[1].checks[1].tolerance.precent"),
        "{}",
        lines[0]
    );
    assert!(lines[49].contains("steps[50].checks[1]"), "{}", lines[49]);
}

#[test]
fn one_sample_needs_a_declared_repeatability() {
    let one = GOOD.replace("  samples: 8\n", "  samples: 1\n");
    let e = errors(&one).to_string();
    assert!(
        e.contains("defaults.samples: one sample has no spread of its own"),
        "{e}"
    );
    // Said once, at the defaults, though every step inherits it.
    assert_eq!(e.matches("one sample has no spread").count(), 1, "{e}");
    // One step of one sample: refused at that step, accepted once its repeatability is declared.
    let single = GOOD.replace(
        "    load: { current: 500 mA }\n",
        "    load: { current: 500 mA }\n    samples: 1\n",
    );
    let e = errors(&single).to_string();
    assert!(
        e.contains("steps[2].samples: one sample has no spread"),
        "{e}"
    );
    let declared = single.replace(
        "    samples: 1\n",
        "    samples: 1\n    repeatability: { relative: 0.05 %, from: golden-unit study GU-12 }\n",
    );
    let plan = Plan::from_text("p.yaml", &declared).unwrap();
    let r = plan.steps[1].repeatability.as_ref().unwrap();
    assert!((r.relative - 0.0005).abs() < 1e-15 && r.from == "golden-unit study GU-12");
}

/// `check` warns, before any load, when the reference alone leaves a guarded check no
/// acceptance zone (ILAC-G8:09/2019: AL = TL − U below zero): the simulated reference's
/// ±(0.01 % of reading + 0.005 % of range) at 230 V already gives U ≥ 0.019 %, above a ±0.015 % tolerance.
#[test]
fn check_warns_of_an_empty_acceptance_zone() {
    let dir = std::env::temp_dir().join(format!("meterproof-zone-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("tight.yaml");
    std::fs::write(
        &path,
        GOOD.replace(
            "      - { quantity: voltage, tolerance: { percent: 0.5 % } }",
            "      - { quantity: voltage, tolerance: { percent: 0.015 % } }",
        ),
    )
    .unwrap();
    let check = |p: &std::path::Path| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_meterproof"))
            .arg("check")
            .arg(p)
            .output()
            .unwrap();
        assert!(out.status.success());
        String::from_utf8(out.stdout).unwrap()
    };
    let text = check(&path);
    assert!(
        text.contains("warning: step basic-Ib voltage: U is at least")
            && text.contains("no acceptance zone"),
        "{text}"
    );
    assert!(text.contains("simulated bench's reference"), "{text}");
    // The shipped plan has none.
    assert!(!check(std::path::Path::new("test-plans/demo.yaml")).contains("warning"));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn calibration_limits_are_checked_where_they_are_written() {
    let good = include_str!("../test-plans/calibrate.yaml");
    let e = errors(&good.replace(
        "gain: { nominal: 2240, within: 3 % }",
        "gain: { nominal: 2240, within: 0 % }",
    ))
    .to_string();
    assert!(
        e.contains("calibration.limits.gain.within") && e.contains("wider than zero"),
        "{e}"
    );
    let e = errors(&good.replace(
        "offset: { nominal: 128, within: 40 }",
        "offset: { nominal: lots, within: 40 }",
    ))
    .to_string();
    assert!(e.contains("calibration.limits.offset.nominal"), "{e}");
    let e = errors(
        &good
            .replace(
                "  write: { offset: offset_current, gain: gain_current }\n",
                "",
            )
            .replace(
                "    linearity: 0.5 %",
                "    linearity: 0.5 %\n    read_back: 0.01 %",
            ),
    )
    .to_string();
    assert!(e.contains("nothing is written back"), "{e}");
}

/// `ratings.class` is needed only where a check or special test takes the class's figures: a
/// plan of explicit tolerances may leave it out; a class check without it says what to add.
#[test]
fn the_class_is_needed_only_where_it_is_used() {
    let no_class = GOOD.replace(
        "  class: \"1\"          # IEC 62053-21 class 1: active power and energy limits come from the class table\n",
        "",
    );
    assert_ne!(no_class, GOOD);
    let e = errors(&no_class).to_string();
    assert!(e.contains("give ratings.class"), "{e}");
    assert!(!e.contains("missing field"), "{e}");
    let explicit = no_class.replace("tolerance: { class: true }", "tolerance: { percent: 1 % }");
    let plan = Plan::from_text("p.yaml", &explicit).expect("valid without a class");
    assert!(plan.ratings.class.is_empty());
}

/// A class table the class has none in is refused where it is written, naming the tables there
/// are.
#[test]
fn an_unknown_class_table_is_refused_with_the_ones_there_are() {
    let text = GOOD.replace(
        "  class: \"1\"          # IEC 62053-21 class 1: active power and energy limits come from the class table\n",
        "  class: \"1\"\n  class_table: Directive 2014/32/EU\n",
    );
    assert!(text.contains("class_table"));
    let e = errors(&text).to_string();
    assert!(
        e.contains("ratings.class_table")
            && e.contains(
                "class 1 has no table from \"Directive 2014/32/EU\"; write one of: IEC 62053-21"
            ),
        "{e}"
    );
}

const MODBUS: &str = include_str!("../test-plans/demo-modbus.yaml");

/// The `modbus` link's section: each mistake with its path and line, all in one pass.
#[test]
fn modbus_link_mistakes_are_refused_with_their_place() {
    assert!(Plan::from_text("m.yaml", MODBUS).is_ok());
    let text = MODBUS
        .replace("address: 1 ", "address: 300 ")
        .replace(
            "{ register: 0x0000, type: f32, unit: V,",
            "{ register: 0x0000, type: f16, unit: V,",
        )
        .replace(
            "{ register: 0x0004, type: f32, unit: W,",
            "{ register: 0x0004, type: f32, unit: kWh,",
        )
        .replace(
            "{ register: 0x1010, type: ascii, words: 4 }",
            "{ register: 0x1010, type: ascii }",
        )
        .replace(
            "{ register: 0x000C, type: f32,",
            "{ register: 70000, type: f32,",
        )
        .replace(
            "{ register: 0x200C, type: f64, function: holding }",
            "{ register: 0x200C, type: f64, function: input }",
        )
        .replace("word_order: high_first", "word_order: middle_first");
    let e = errors(&text);
    let found = |path: &str, words: &str| {
        let hit =
            e.0.iter()
                .find(|x| x.path == path)
                .unwrap_or_else(|| panic!("no error at {path}: {e}"));
        assert!(hit.message.contains(words), "{path}: {}", hit.message);
        hit.position.map(|p| p.line)
    };
    assert_eq!(
        found("link.address", "from 1 to 247"),
        Some(line_of(&text, "address: 300"))
    );
    assert_eq!(
        found("link.quantities.voltage.type", "\"f16\" is not one of"),
        Some(line_of(&text, "type: f16"))
    );
    found("link.quantities.active_power.unit", "kWh");
    found(
        "link.identity.firmware.words",
        "needs its number of registers",
    );
    found("link.quantities.frequency.register", "from 0 to 65535");
    found(
        "link.writes.offset_current.function",
        "input registers cannot be written",
    );
    found(
        "link.word_order",
        "\"middle_first\" is not one of high_first, low_first",
    );
    // A ascii register read as a quantity, and a key a register does not take.
    let text = MODBUS.replace(
        "power_factor:   { register: 0x000A, type: f32,",
        "power_factor:   { register: 0x000A, type: ascii, words: 2, format: 'x{value}',",
    );
    let e = errors(&text);
    assert!(
        e.0.iter()
            .any(|x| x.path == "link.quantities.power_factor.type"
                && x.message.contains("only be an identity field")),
        "{e}"
    );
    assert!(
        e.0.iter()
            .any(|x| x.path == "link.quantities.power_factor.format"),
        "{e}"
    );
}

const READOUT: &str = include_str!("../test-plans/demo-readout.yaml");

/// The `iec62056_21` link's section: OBIS codes, identity sources, units, each with its place.
#[test]
fn readout_link_mistakes_are_refused_with_their_place() {
    assert!(Plan::from_text("r.yaml", READOUT).is_ok());
    let text = READOUT
        .replace("{ obis: 31.7.0, unit: A,", "{ obis: 31.7, unit: A,")
        .replace("{ obis: 32.7.0, unit: V,", "{ obis: 32.7.0, unit: kWh,")
        .replace("serial: C.1.0", "serial: the nameplate")
        .replace("read: readout", "read: one_by_one")
        .replace("max_bytes: 8192", "max_bytes: 10");
    let e = errors(&text);
    let found = |path: &str, words: &str| {
        let hit =
            e.0.iter()
                .find(|x| x.path == path)
                .unwrap_or_else(|| panic!("no error at {path}: {e}"));
        assert!(hit.message.contains(words), "{path}: {}", hit.message);
        hit.position.map(|p| p.line)
    };
    assert_eq!(
        found("link.quantities.current.obis", "not an OBIS code"),
        Some(line_of(&text, "obis: 31.7,"))
    );
    found("link.quantities.voltage.unit", "kWh");
    found(
        "link.identity.serial",
        "neither `identification` nor an OBIS code",
    );
    found(
        "link.read",
        "\"one_by_one\" is not one of readout, register",
    );
    found("link.max_bytes", "from 64 to");
}

/// The console keys of a `text` link: an empty prompt, an init line that is neither a line nor
/// `{ send, reply }`, one without `send`, one with an unknown key, and a reply pattern that does
/// not compile are each refused at their path, all in one pass.
#[test]
fn console_link_keys_are_checked_where_they_are_written() {
    let console = include_str!("../test-plans/demo-console.yaml");
    let text = console
        .replace("  prompt: \"> \"", "  prompt: \"\"")
        .replace(
            "    - { send: log off, reply: '^logging stopped$' }",
            "    - [log, off]\n    - { reply: '^ok$' }\n    - { send: x, wait: 1 s }\n    - { send: y, reply: '(' }",
        );
    let e = errors(&text);
    let shown = e.to_string();
    for (path, says) in [
        ("link.prompt", "a prompt cannot be empty"),
        (
            "link.init[1]",
            "write a line to send, or { send: LINE, reply: PATTERN }",
        ),
        ("link.init[2]", "an init line needs send"),
        ("link.init[3]", "unknown key \"wait\""),
        ("link.init[4].reply", ""),
    ] {
        assert!(
            e.0.iter()
                .any(|x| x.path == path && x.message.contains(says)),
            "{path}: {shown}"
        );
    }
    // Each with its line in the file.
    assert!(
        shown.contains(&format!("p.yaml:{}:", line_of(&text, "prompt: \"\""))),
        "{shown}"
    );
}

/// The `pulses` section and the checks on the test output, each mistake at its path and line.
#[test]
fn pulse_sections_are_checked_where_they_are_written() {
    let good = include_str!("../test-plans/demo-pulses.yaml");
    let text = good
        .replace(
            "pulses: { method: fixed_pulses, count: 25, at_most: 2 min }",
            "pulses: { method: fixed_pulses, count: 50, at_most: 2 min }",
        )
        .replace(
            "pulses: { method: fixed_pulses, resolution: 4 %, at_most: 5 min }",
            "pulses: { method: fixed_count, resolution: 4 % }",
        )
        .replace(
            "pulses: { method: fixed_time, resolution: 0.25 % }",
            "pulses: { method: fixed_time }",
        )
        .replace(
            "      - { quantity: active_power, tolerance: { class: true } }",
            "      - { quantity: voltage, channel: test_output, tolerance: { percent: 1 % } }",
        );
    let e = errors(&text);
    let shown = e.to_string();
    // Each mistake once, nothing said again for the window it leaves unknown.
    assert_eq!(e.0.len(), 4, "{shown}");
    for (path, says) in [
        // 50 pulses of 1 Wh at 1150 W take 156.5 s: more than 2 min.
        ("steps[2].pulses.count", "50 pulses at"),
        (
            "steps[2].pulses.count",
            "take 2 min 37 s, and at_most is 2 min 0 s",
        ),
        ("steps[3].pulses.method", "unknown method \"fixed_count\""),
        ("steps[1].pulses", "fixed_time needs gate (or resolution)"),
        (
            "steps[2].checks[2].channel",
            "voltage cannot be read from it",
        ),
    ] {
        assert!(
            shown
                .lines()
                .any(|l| l.contains(&format!(" {path}: ")) && l.contains(says)),
            "{path}: {shown}"
        );
    }
    assert!(
        shown.contains(&format!(
            "p.yaml:{}:",
            line_of(&text, "method: fixed_count")
        )),
        "{shown}"
    );
    // A check on the test output with no pulses to count; pulses with no meter constant.
    let text = good
        .replace(
            "    pulses: { method: fixed_pulses, count: 25, at_most: 2 min }\n",
            "",
        )
        .replace("  meter_constant: 1000 imp/kWh\n", "");
    let e = errors(&text);
    let shown = e.to_string();
    for (path, says) in [
        (
            "steps[2].checks[1].channel",
            "needs the step to count pulses",
        ),
        ("steps[1].pulses", "ratings.meter_constant"),
    ] {
        assert!(
            shown
                .lines()
                .any(|l| l.contains(&format!(" {path}: ")) && l.contains(says)),
            "{path}: {shown}"
        );
    }
}
