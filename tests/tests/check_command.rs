//! `ridgeline check`: a summary for valid configs, every problem at once for bad ones.

use ridgeline_tests::{ridgeline, write_file};

/// The workspace root, where `config/` lives.
pub fn root() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ sits in the workspace")
        .to_path_buf()
}

/// `tests/corpus/valid-config.toml` (one loop, one input) with some text swapped.
pub fn config(replace: &[(&str, &str)]) -> String {
    let mut text =
        std::fs::read_to_string(root().join("tests/corpus/valid-config.toml")).expect("the corpus is there");
    for (from, to) in replace {
        assert!(text.contains(from), "the base config has no `{from}`");
        text = text.replacen(from, to, 1);
    }
    text
}

fn check(text: &str) -> ridgeline_tests::Run {
    let dir = tempfile::tempdir().unwrap();
    let path = write_file(dir.path(), "ridgeline.toml", text);
    ridgeline(&["check", "--config", path.to_str().unwrap()])
}

#[test]
fn the_example_config_is_valid_and_summarised() {
    let path = root().join("config/rehearse-example.toml");
    let run = ridgeline(&["check", "--config", path.to_str().unwrap()]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    for needle in [
        "valid, 1 loop",
        "dither 0.008333 Hz",
        "60.0 ticks per period",
        "ReH 0.96",
        "predicted time constant",
    ] {
        assert!(run.stdout.contains(needle), "missing `{needle}` in:\n{}", run.stdout);
    }
    assert!(!run.stdout.contains("warning"), "{}", run.stdout);
}

#[test]
fn every_problem_is_reported_at_once_with_its_key_path_and_line() {
    let text = config(&[
        ("tick_s = 1.0", "tick_s = 1.0\nspeed = 3"),
        ("bounds = [0.0, 6.0]", "bounds = [-1.0, 6.0]"),
        ("objective = \"y\"", "objective = \"y / fuel\""),
        ("highpass_hz = 0.01", "highpass_hz = 0.08"),
        ("safe = 2.7", "safe = 7"),
    ]);
    let run = check(&text);
    assert_eq!(run.code, Some(2));
    for needle in [
        "loops[0].speed: unknown key `speed`",
        "loops[0].inputs[0].bounds: [-1, 6] reaches outside the limits [0, 6]",
        "loops[0].objective: `fuel` at column 5 is not a tag",
        "loops[0].filter.highpass_hz: 0.08 Hz is not below the dither frequency",
        "loops[0].inputs[0].safe: 7 lies outside the limits",
        "5 problems",
    ] {
        assert!(run.stderr.contains(needle), "missing `{needle}` in:\n{}", run.stderr);
    }
    let speed_line = run.stderr.lines().find(|l| l.contains("speed")).unwrap();
    assert!(speed_line.contains("line 23, column 1"), "{speed_line}");
}

#[test]
fn toml_syntax_errors_name_line_and_column() {
    let run = check("[[loops]]\nname = \"a\nobjective = 1\n");
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("line 2, column"), "{}", run.stderr);
    assert!(run.stderr.contains("TOML syntax"), "{}", run.stderr);
}

#[test]
fn dither_frequencies_that_collide_after_folding_are_refused() {
    // Source: CHECKS.md "Several inputs": (0.3, 0.4) Hz at fs = 1 is refused, since 2*0.3 = 0.6 folds onto 0.4.
    let two = |p1: &str, p2: &str| {
        let second = format!(
            "gain = 0.00125\n\n[[loops.inputs]]\nname = \"v\"\nwrite = {{ link = \"plc\", holding_register = 10, type = \"f32\" }}\n\
             limits = [0.0, 6.0]\nbounds = [0.0, 6.0]\nsafe = 1\nmax_rate_per_s = 1.0\ndither_amplitude = 0.01\n\
             dither_period_s = {p2}\ngain = 0.001\n"
        );
        config(&[
            ("dither_period_s = 20", &format!("dither_period_s = {p1}")),
            ("gain = 0.00125\n", &second),
            ("highpass_hz = 0.01", "highpass_hz = 0.001"),
        ])
    };
    let folded = check(&two("3.3333333333333335", "2.5"));
    assert_eq!(folded.code, Some(2));
    assert!(folded.stderr.contains("collides with twice the dither frequency of `u`"), "{}", folded.stderr);

    let doubled = check(&two("20", "10"));
    assert!(doubled.stderr.contains("collides with twice the dither frequency of `u`"), "{}", doubled.stderr);
    let equal = check(&two("20", "20"));
    assert!(equal.stderr.contains("same frequency as `u`"), "{}", equal.stderr);
    let apart = check(&two("20", "14.285714285714286"));
    assert_eq!(apart.code, Some(0), "{}", apart.stderr);
}

#[test]
fn a_frequency_at_the_sum_of_two_others_is_refused() {
    let inputs: String = [("v", 10, "12.5"), ("w", 20, "20")]
        .iter()
        .map(|(name, reg, period)| {
            format!(
                "\n[[loops.inputs]]\nname = \"{name}\"\nwrite = {{ link = \"plc\", holding_register = {reg}, type = \"f32\" }}\n\
                 limits = [0.0, 6.0]\nbounds = [0.0, 6.0]\nsafe = 1\nmax_rate_per_s = 1.0\ndither_amplitude = 0.01\n\
                 dither_period_s = {period}\ngain = 0.001\n"
            )
        })
        .collect();
    // Frequencies 1/33.33 = 0.03, 0.08 and 0.05 Hz: 0.03 + 0.05 = 0.08.
    let text = config(&[
        ("dither_period_s = 20", "dither_period_s = 33.333333333333336"),
        ("gain = 0.00125\n", &format!("gain = 0.00125\n{inputs}")),
        ("highpass_hz = 0.01", "highpass_hz = 0.001"),
    ]);
    let run = check(&text);
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("collides with the sum of those of"), "{}", run.stderr);
}

#[test]
fn check_warns_when_adaptation_is_fast_or_the_highpass_is_out_of_the_usual_band() {
    let text = config(&[
        ("tick_s = 1.0", "tick_s = 1.0\ncurvature_hint = 400"),
        ("highpass_hz = 0.01", "highpass_hz = 0.001"),
    ]);
    let run = check(&text);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    // Common practice, no single source: adapt over at least 5 dither periods; cutoff f/10..f/2.
    assert!(run.stdout.contains("warning: adaptation is faster than 5 dither periods"), "{}", run.stdout);
    assert!(
        run.stdout.contains("warning: the high-pass cutoff is 0.020 of the dither frequency"),
        "{}",
        run.stdout
    );
}

#[test]
fn a_missing_file_is_a_clear_error_with_exit_2() {
    let run = ridgeline(&["check", "--config", "/nonexistent/ridgeline.toml"]);
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("/nonexistent/ridgeline.toml: cannot read the file"), "{}", run.stderr);
}
