//! The shipped alert rules (`deploy/alerts.yml`) under Prometheus' own rule tester, with
//! the cases of `deploy/alerts.test.yml`: every alert fires on its series and stays quiet
//! without it.

use std::collections::BTreeSet;
use std::process::Command;

use ridgeline_tests::{promtool, python_json};

use crate::check_command::root;

/// Runs `promtool` with `args` in `deploy/` and fails the test, with everything promtool
/// printed, unless it succeeds.
fn promtool_in_deploy(args: &[&str]) {
    let out = Command::new(promtool())
        .args(args)
        .current_dir(root().join("deploy"))
        .output()
        .expect("promtool starts");
    assert!(
        out.status.success(),
        "promtool {} failed ({}):\n{}{}",
        args.join(" "),
        out.status,
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn every_alert_fires_on_its_series_and_stays_quiet_without_it() {
    // Source: promtool check rules, Debian's prometheus package.
    promtool_in_deploy(&["check", "rules", "alerts.yml"]);
    // Source: promtool test rules, Debian's prometheus package.
    promtool_in_deploy(&["test", "rules", "alerts.test.yml"]);
}

#[test]
fn every_alert_has_a_case_where_it_fires_and_one_where_it_stays_quiet() {
    // Both files read with PyYAML, pinned in tests/requirements.txt; promtool runs the
    // cases, this only makes sure none of alerts.yml's alerts is left without any.
    let deploy = root().join("deploy");
    let found = python_json(&format!(
        "import json, yaml\n\
         rules = yaml.safe_load(open({rules:?}))\n\
         cases = yaml.safe_load(open({cases:?}))\n\
         tests = [t for g in cases['tests'] for t in g.get('alert_rule_test') or []]\n\
         print(json.dumps({{\n\
         \x20   'alerts': [r['alert'] for g in rules['groups'] for r in g['rules'] if 'alert' in r],\n\
         \x20   'rule_files': cases['rule_files'],\n\
         \x20   'tested': [t['alertname'] for t in tests],\n\
         \x20   'firing': [t['alertname'] for t in tests if t.get('exp_alerts')],\n\
         \x20   'quiet': [t['alertname'] for t in tests if not t.get('exp_alerts')],\n\
         }}))",
        rules = deploy.join("alerts.yml").display().to_string(),
        cases = deploy.join("alerts.test.yml").display().to_string(),
    ));
    let names = |key: &str| -> BTreeSet<String> {
        found[key]
            .as_array()
            .unwrap_or_else(|| panic!("no `{key}` in {found}"))
            .iter()
            .map(|v| v.as_str().expect("a name").to_owned())
            .collect()
    };
    let alerts = names("alerts");
    assert!(!alerts.is_empty(), "deploy/alerts.yml has no alert: {found}");
    assert_eq!(found["rule_files"], serde_json::json!(["alerts.yml"]), "the cases test the shipped rules");
    for alert in &alerts {
        assert!(names("firing").contains(alert), "no case in deploy/alerts.test.yml expects {alert} to fire");
        assert!(
            names("quiet").contains(alert),
            "no case in deploy/alerts.test.yml expects {alert} to stay quiet"
        );
    }
    // A case naming no rule expects nothing and passes whatever happens.
    let unknown: Vec<_> = names("tested").difference(&alerts).cloned().collect();
    assert!(unknown.is_empty(), "deploy/alerts.test.yml tests alerts that alerts.yml lacks: {unknown:?}");
}
