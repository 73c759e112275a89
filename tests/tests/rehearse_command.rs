//! `ridgeline rehearse`: the example converges, the same case gives the same numbers as
//! driving the core directly, faults are reported instead of written, and loops rehearsed
//! separately are compared in the report and in one plot.

use ridgeline::config::Range;
use ridgeline_tests::{python_json, ridgeline, write_file};

use crate::check_command::{config, root};
use crate::drive::{decay_time_constant, input, run, seeker, settings};

pub fn rehearse(config: &str, plant: &str, extra: &[&str]) -> ridgeline_tests::Run {
    let mut args = vec!["rehearse", "--config", config, "--plant", plant];
    args.extend_from_slice(extra);
    ridgeline(&args)
}

fn json(run: &ridgeline_tests::Run) -> serde_json::Value {
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("not JSON ({e}):\n{}", run.stdout))
}

/// Parses a rehearsal CSV into its header and rows of numbers (NaN for empty cells).
pub fn read_csv(path: &std::path::Path) -> (Vec<String>, Vec<Vec<f64>>) {
    let text = std::fs::read_to_string(path).expect("CSV written");
    let mut lines = text.lines();
    let header = lines.next().expect("header").split(',').map(str::to_owned).collect();
    let rows = lines
        .map(|l| {
            l.split(',').map(|c| if c.is_empty() { f64::NAN } else { c.parse().expect("number") }).collect()
        })
        .collect();
    (header, rows)
}

#[test]
fn the_example_converges_and_writes_report_plot_and_csv() {
    let dir = tempfile::tempdir().unwrap();
    let (cfg, plant) =
        (root().join("config/rehearse-example.toml"), root().join("config/rehearse-example-plant.toml"));
    let (svg, csv) = (dir.path().join("r.svg"), dir.path().join("csv"));
    let run = rehearse(
        cfg.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "6h", "--json", "--plot", svg.to_str().unwrap(), "--csv", csv.to_str().unwrap()],
    );
    let report = json(&run);
    let l = &report["loops"][0];
    assert_eq!(l["name"], "dryer-1-inlet");
    assert_eq!(l["ticks"], 10_800);
    let settle = l["settle_time_s"].as_f64().expect("settles");
    assert!(settle < 3.0 * 3600.0, "settled only after {settle} s");
    let last = &l["final"]["inlet_temp_degc"];
    let miss = (last["estimate"].as_f64().unwrap() - last["optimum"].as_f64().unwrap()).abs();
    assert!(miss < 0.02 * 40.0, "ends {miss} from the optimum");
    assert!(l["relative_loss"].as_f64().unwrap() < 0.005, "{l}");
    assert_eq!(l["bound_hits"], 0);

    let picture = std::fs::read_to_string(&svg).expect("SVG written");
    assert!(picture.starts_with("<svg") && picture.trim_end().ends_with("</svg>"));
    assert!(picture.contains("dryer-1-inlet") && picture.contains("inlet_temp_degc"));

    let (header, rows) = read_csv(&csv.join("dryer-1-inlet.csv"));
    assert_eq!(
        header.join(","),
        "t_s,objective,optimum_objective,inlet_temp_degc.applied,inlet_temp_degc.estimate,inlet_temp_degc.gradient,inlet_temp_degc.optimum"
    );
    assert_eq!(rows.len(), 10_800);
    assert!(rows.windows(2).all(|w| w[1][0] - w[0][0] == 2.0), "one row per 2 s tick");
}

const CLASSIC_PLANT: &str = r#"
step_s = 0.25
[[inputs]]
name = "u"
initial = 2.7
holding_register = 0
[[outputs]]
name = "y"
input_register = 0
expression = "10 - 2 * (u - 3)^2"
"#;

#[test]
fn rehearsing_the_classic_case_matches_driving_the_core_directly() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write_file(dir.path(), "classic.toml", &config(&[]));
    let plant = write_file(dir.path(), "classic-plant.toml", CLASSIC_PLANT);
    let csv = dir.path().join("csv");
    let report = json(&rehearse(
        cfg.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "6000s", "--json", "--csv", csv.to_str().unwrap()],
    ));
    let (_, rows) = read_csv(&csv.join("test-loop.csv"));

    let mut core = seeker(
        &settings(1.0, 0.01, 0.0, vec![input(0.1, 20.0, 0.00125)]),
        Range { min: 0.0, max: 6.0 },
        &[2.7],
    );
    let direct = run(&mut core, 6000, |u| 10.0 - 2.0 * (u[0] - 3.0).powi(2));
    // Source: CHECKS.md "Classic loop": rehearse gives the same numbers as driving the core directly.
    for (n, row) in rows.iter().enumerate() {
        assert_eq!(row[1].to_bits(), direct.objective[n].to_bits(), "objective at tick {n}");
        assert_eq!(row[3].to_bits(), direct.applied[n][0].to_bits(), "applied at tick {n}");
        assert_eq!(row[4].to_bits(), direct.estimates[n][0].to_bits(), "estimate at tick {n}");
    }
    let error: Vec<f64> = rows.iter().map(|r| r[4] - 3.0).collect();
    let tau = decay_time_constant(&error, 20, 0.8, 0.02);
    // Source: averaged system (Tan, Nešić & Mareels 2006), about 207.4 s (CHECKS.md).
    assert!((tau / 207.4 - 1.0).abs() < 0.03, "time constant {tau}");
    let l = &report["loops"][0];
    // Source: averaged system, mean loss c a^2 / 2 = 0.0100 (CHECKS.md), over the last quarter.
    assert!((l["mean_loss"].as_f64().unwrap() / 0.01 - 1.0).abs() < 0.02, "{l}");
    assert!((l["final"]["u"]["optimum"].as_f64().unwrap() - 3.0).abs() < 1e-6, "{l}");
}

#[test]
fn a_non_finite_objective_is_reported_and_never_written() {
    let dir = tempfile::tempdir().unwrap();
    // The objective takes a square root of a value that is negative half of the time.
    let cfg =
        write_file(dir.path(), "nan.toml", &config(&[("objective = \"y\"", "objective = \"sqrt(y)\"")]));
    let plant = write_file(
        dir.path(),
        "nan-plant.toml",
        &CLASSIC_PLANT.replace("\"10 - 2 * (u - 3)^2\"", "\"10 - 2 * (u - 3)^2 + 20 * swing\"").replace(
            "[[outputs]]",
            "[[drifts]]\nname = \"swing\"\nstart = 0\nsine_amplitude = 1\nsine_period_s = 600\n[[outputs]]",
        ),
    );
    let csv = dir.path().join("csv");
    let report = json(&rehearse(
        cfg.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "1h", "--json", "--csv", csv.to_str().unwrap()],
    ));
    let l = &report["loops"][0];
    assert!(l["objective_faults"].as_u64().unwrap() > 100, "{l}");
    assert_eq!(l["events"][0]["kind"], "objective_not_finite");
    let (_, rows) = read_csv(&csv.join("test-loop.csv"));
    assert!(rows.iter().any(|r| r[1].is_nan()), "some objectives were not finite");
    for r in &rows {
        assert!(r[3].is_finite() && (0.0..=6.0).contains(&r[3]), "applied {}", r[3]);
    }
}

#[test]
fn a_loop_that_recovers_automatically_goes_on_seeking_from_where_the_plant_stands() {
    let dir = tempfile::tempdir().unwrap();
    // The plant starts at u = 1 (objective 2), outside the plausible range: the loop trips
    // and writes safe (2.7, objective 9.82), recovers after 30 s, and then seeks u = 3.
    let cfg = write_file(
        dir.path(),
        "auto.toml",
        &config(&[(
            "stale_after_s = 10",
            "stale_after_s = 10\nobjective_range = [5.0, 20.0]\nrecover = \"auto\"\nrecover_after_s = 30",
        )]),
    );
    let plant = write_file(dir.path(), "p.toml", &CLASSIC_PLANT.replace("initial = 2.7", "initial = 1.0"));
    let report =
        json(&rehearse(cfg.to_str().unwrap(), plant.to_str().unwrap(), &["--duration", "6000s", "--json"]));
    let l = &report["loops"][0];
    let transitions: Vec<&str> = l["events"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|e| e["kind"].as_str())
        .filter(|k| ["tripped", "recovered"].contains(k))
        .collect();
    assert_eq!(transitions, ["tripped", "recovered"]);
    let estimate = l["final"]["u"]["estimate"].as_f64().unwrap();
    // About 28 time constants of 207 s after the recovery: at the optimum.
    assert!((estimate - 3.0).abs() < 0.05, "ended at {estimate}: {l}");
}

#[test]
fn a_config_that_does_not_fit_the_plant_names_the_key() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write_file(dir.path(), "c.toml", &config(&[("holding_register = 0", "holding_register = 40")]));
    let plant = write_file(dir.path(), "p.toml", CLASSIC_PLANT);
    let run = rehearse(cfg.to_str().unwrap(), plant.to_str().unwrap(), &[]);
    assert_eq!(run.code, Some(2));
    assert!(
        run.stderr.contains("loops[0].inputs[0].write.holding_register: the plant model serves no input at holding register 40"),
        "{}",
        run.stderr
    );
}

#[test]
fn a_tick_that_is_not_a_whole_number_of_plant_steps_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = write_file(dir.path(), "c.toml", &config(&[]));
    let plant = write_file(dir.path(), "p.toml", &CLASSIC_PLANT.replace("step_s = 0.25", "step_s = 0.4"));
    let run = rehearse(cfg.to_str().unwrap(), plant.to_str().unwrap(), &[]);
    assert_eq!(run.code, Some(2));
    assert!(
        run.stderr.contains("loops[0].tick_s: 1 s is not a whole number of the plant model's 0.4 s steps"),
        "{}",
        run.stderr
    );
}

#[test]
fn separately_each_loop_gets_its_own_plant_and_the_report_compares_them() {
    let dir = tempfile::tempdir().unwrap();
    // Two tunings of the same loop, writing the same register: only a rehearsal with a
    // plant per loop can run them, and `check` refuses the file for a live service.
    let base = config(&[]);
    let first = &base[base.find("[[loops]]").expect("a loop")..];
    let faster = first
        .replace("name = \"test-loop\"", "name = \"test-loop-fast\"")
        .replace("gain = 0.00125", "gain = 0.005");
    let cfg = write_file(dir.path(), "two.toml", &format!("{base}\n{faster}"));
    let plant = write_file(dir.path(), "classic-plant.toml", CLASSIC_PLANT);
    let checked = ridgeline(&["check", "--config", cfg.to_str().unwrap()]);
    assert_eq!(checked.code, Some(2), "{}", checked.stdout);
    assert!(checked.stderr.contains("already written by"), "{}", checked.stderr);

    let args = ["--duration", "6000s", "--separately"];
    let report =
        json(&rehearse(cfg.to_str().unwrap(), plant.to_str().unwrap(), &[&args[..], &["--json"]].concat()));
    let rows = report["comparison"].as_array().expect("a comparison");
    assert_eq!(rows.len(), 2);
    assert_eq!(
        (rows[0]["loop"].as_str(), rows[1]["loop"].as_str()),
        (Some("test-loop"), Some("test-loop-fast"))
    );
    assert!(rows.iter().all(|r| r["method"] == "sine"), "{rows:?}");
    let settle = |r: &serde_json::Value| r["settle_time_s"].as_f64().expect("settles");
    // Each against its own plant: four times the gain, about four times as fast.
    assert!(settle(&rows[1]) < 0.5 * settle(&rows[0]), "{rows:?}");
    // The first loop alone is the classic case: the same result as rehearsed on its own.
    let alone = json(&rehearse(
        write_file(dir.path(), "one.toml", &base).to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "6000s", "--json"],
    ));
    assert_eq!(report["loops"][0]["final"], alone["loops"][0]["final"]);
    assert!(alone.get("comparison").is_none());

    let text = rehearse(cfg.to_str().unwrap(), plant.to_str().unwrap(), &args);
    assert_eq!(text.code, Some(0), "{}", text.stderr);
    assert!(
        text.stdout.contains("side by side") && text.stdout.contains("test-loop-fast  sine"),
        "{}",
        text.stdout
    );
}

#[test]
fn separately_one_plot_overlays_the_loops_estimates_and_its_legend_names_each_loop_and_method() {
    let dir = tempfile::tempdir().unwrap();
    // The classic loop and a Newton loop, each on its own copy of the classic plant.
    let base = config(&[]);
    let first = &base[base.find("[[loops]]").expect("a loop")..];
    let newton = first
        .replace("name = \"test-loop\"", "name = \"test-loop-newton\"")
        .replace("tick_s = 1.0", "tick_s = 1.0\nmethod = \"newton\"")
        .replace(
            "[loops.watchdog]",
            "[loops.newton]\ntime_constant_s = 600\nhessian_hz = 0.002\ninitial_curvature = 4\n\n[loops.watchdog]",
        )
        .replace("gain = 0.00125", "");
    let cfg = write_file(dir.path(), "methods.toml", &format!("{base}\n{newton}"));
    let plant = write_file(dir.path(), "classic-plant.toml", CLASSIC_PLANT);
    let svg = dir.path().join("compare.svg");
    let run = rehearse(
        cfg.to_str().unwrap(),
        plant.to_str().unwrap(),
        &["--duration", "6000s", "--separately", "--plot", svg.to_str().unwrap()],
    );
    assert_eq!(run.code, Some(0), "{}", run.stderr);

    // Source: reference library Python xml.etree.ElementTree, which refuses XML that is not well-formed.
    let parsed = python_json(&format!(
        "import json, xml.etree.ElementTree as ET\nroot = ET.parse({path:?}).getroot()\n\
         texts = [''.join(t.itertext()).strip() for t in root.iter('{{http://www.w3.org/2000/svg}}text')]\n\
         print(json.dumps({{'root': root.tag, 'texts': texts}}))",
        path = svg.display().to_string()
    ));
    assert_eq!(parsed["root"], "{http://www.w3.org/2000/svg}svg");
    let texts: Vec<&str> =
        parsed["texts"].as_array().expect("a list").iter().filter_map(|t| t.as_str()).collect();
    // One panel, for the input both loops drive, instead of a column of panels per loop.
    let titles: Vec<&str> = texts.iter().copied().filter(|t| t.ends_with("estimate per loop")).collect();
    assert_eq!(titles, ["u: estimate per loop"], "{texts:?}");
    assert!(!texts.iter().any(|t| t.contains("(maximize)")), "{texts:?}");
    for entry in ["test-loop (sine)", "test-loop-newton (newton)", "optimum"] {
        assert_eq!(texts.iter().filter(|t| **t == entry).count(), 1, "legend entry `{entry}` in {texts:?}");
    }
}

#[test]
fn the_methods_example_rehearses_the_three_methods_side_by_side_as_the_readme_shows() {
    let cfg = root().join("config/methods-example.toml");
    let plant = root().join("config/rehearse-example-plant.toml");
    let (cfg, plant) = (cfg.to_str().unwrap(), plant.to_str().unwrap());
    let args = ["--duration", "6h", "--separately"];
    let report = json(&rehearse(cfg, plant, &[&args[..], &["--json"]].concat()));
    let rows = report["comparison"].as_array().expect("a comparison");
    let methods: Vec<_> = rows.iter().map(|r| r["method"].as_str().unwrap_or("?")).collect();
    assert_eq!(methods, ["sine", "newton", "stepwise"]);
    assert!(rows.iter().all(|r| r["settle_time_s"].is_f64() && r["bound_hits"] == 0), "{rows:?}");

    // docs/methods.md's table is what the command prints.
    let text = rehearse(cfg, plant, &args);
    assert_eq!(text.code, Some(0), "{}", text.stderr);
    let readme = std::fs::read_to_string(root().join("docs/methods.md")).expect("docs/methods.md");
    let table: Vec<&str> = text.stdout.lines().skip_while(|l| !l.starts_with("side by side")).collect();
    assert_eq!(table.len(), 5, "{}", text.stdout);
    for line in table {
        assert!(readme.contains(line), "docs/methods.md lacks `{line}`");
    }

    // The three write one setpoint: a file for rehearsal only.
    let checked = ridgeline(&["check", "--config", cfg]);
    assert_eq!(checked.code, Some(2), "{}", checked.stdout);
    assert!(checked.stderr.contains("already written by loops[0].inputs[0].write"), "{}", checked.stderr);
}
