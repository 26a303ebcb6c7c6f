//! What meterproof gives editors and shells: the JSON Schema of plans and stations, checked by a
//! general-purpose JSON Schema validator (the `jsonschema` crate, JSON Schema draft 2020-12)
//! against every shipped plan and station; shell completions and the man page, generated from
//! the command line itself.

mod common;
use common::bin;

fn schema(of: &str) -> serde_json::Value {
    let o = bin().args(["schema", of]).output().unwrap();
    assert_eq!(o.status.code(), Some(0));
    serde_json::from_slice(&o.stdout).unwrap()
}

/// A YAML file as the JSON a language server checks against the schema.
fn as_json(path: &str) -> serde_json::Value {
    let yaml: serde_yaml::Value =
        serde_yaml::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    serde_json::to_value(yaml).unwrap()
}

fn errors(validator: &jsonschema::Validator, doc: &serde_json::Value) -> Vec<String> {
    validator
        .iter_errors(doc)
        .map(|e| format!("{} at {}", e, e.instance_path()))
        .collect()
}

#[test]
fn every_shipped_plan_and_station_passes_its_schema_and_a_typo_does_not() {
    let plan = jsonschema::draft202012::new(&schema("plan")).expect("a valid schema");
    let station = jsonschema::draft202012::new(&schema("station")).expect("a valid schema");
    let mut plans = 0;
    for entry in std::fs::read_dir("test-plans").unwrap() {
        let path = entry.unwrap().path();
        let name = path.to_string_lossy().to_string();
        let doc = as_json(&name);
        let v = if name.contains("station") {
            &station
        } else {
            &plan
        };
        assert_eq!(errors(v, &doc), Vec::<String>::new(), "{name}");
        plans += 1;
    }
    assert!(plans >= 10, "{plans} files");
    // A misspelt key, at the top and deep inside a link and a step, is flagged where it is.
    let text = std::fs::read_to_string("test-plans/demo-console.yaml").unwrap();
    for (from, to, place) in [
        ("ratings:", "ratingz:", ""),
        ("  prompt:", "  promt:", "/link"),
        ("    settle: 2 s", "    setle: 2 s", "/steps/0"),
    ] {
        let doc: serde_yaml::Value = serde_yaml::from_str(&text.replacen(from, to, 1)).unwrap();
        let found = errors(&plan, &serde_json::to_value(doc).unwrap());
        assert!(
            found.iter().any(|e| e.ends_with(&format!(" at {place}"))),
            "{to}: {found:?}"
        );
    }
}

#[test]
fn completions_and_the_man_page_know_every_command() {
    let bash = bin().args(["completions", "bash"]).output().unwrap();
    let script = String::from_utf8_lossy(&bash.stdout);
    for command in [
        "run", "check", "try-link", "history", "compare", "schema", "man",
    ] {
        assert!(script.contains(command), "{command} not completed");
    }
    assert!(script.contains("--sim-firmware"));
    let man = bin().arg("man").output().unwrap();
    let page = String::from_utf8_lossy(&man.stdout);
    assert!(
        page.starts_with(".ie") || page.contains(".TH meterproof 1"),
        "{page}"
    );
    assert!(page.contains("try\\-link"), "{page}");
    let dir = common::temp_dir("man-pages");
    let o = bin().args(["man", "--out"]).arg(&dir).output().unwrap();
    assert_eq!(o.status.code(), Some(0));
    assert!(dir.join("meterproof-run.1").exists());
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Every key the schemas know (every property of every object, at any depth) is named in the
/// README's reference, "Plan, link and station keys", or in "Test plans" for the tolerance
/// forms: a key added to a plan or station without its line in the reference fails here.
#[test]
fn every_key_has_its_line_in_the_readme_reference() {
    fn keys(value: &serde_json::Value, out: &mut std::collections::BTreeSet<String>) {
        match value {
            serde_json::Value::Object(map) => {
                if let Some(serde_json::Value::Object(props)) = map.get("properties") {
                    out.extend(props.keys().cloned());
                }
                for v in map.values() {
                    keys(v, out);
                }
            }
            serde_json::Value::Array(items) => items.iter().for_each(|v| keys(v, out)),
            _ => {}
        }
    }
    let mut all = std::collections::BTreeSet::new();
    keys(&schema("plan"), &mut all);
    keys(&schema("station"), &mut all);
    assert!(all.len() > 100, "{} keys", all.len());
    let readme = std::fs::read_to_string("README.md").unwrap();
    let from = readme.find("## Test plans").unwrap();
    let to = readme.find("## Bench time").unwrap();
    let reference = &readme[from..to];
    let missing: Vec<&String> = all
        .iter()
        .filter(|k| {
            !regex::Regex::new(&format!(r"\b{}\b", regex::escape(k)))
                .unwrap()
                .is_match(reference)
        })
        .collect();
    assert!(
        missing.is_empty(),
        "keys without a line in the README: {missing:?}"
    );
}
