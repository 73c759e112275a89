//! Broken input files: a clear message and exit 2 for each, and no panic on any input.

use std::path::Path;

use proptest::prelude::*;
use ridgeline_tests::ridgeline;

use crate::check_command::root;

/// Each corpus file lists what its message must say in `# expect: ...` lines.
fn expectations(path: &Path) -> Vec<String> {
    let text = String::from_utf8_lossy(&std::fs::read(path).expect("corpus file is readable")).into_owned();
    let expected: Vec<String> =
        text.lines().filter_map(|l| l.strip_prefix("# expect: ")).map(str::to_owned).collect();
    assert!(!expected.is_empty(), "{} has no `# expect:` line", path.display());
    expected
}

fn corpus(dir: &str) -> Vec<std::path::PathBuf> {
    let mut files: Vec<_> = std::fs::read_dir(root().join("tests/corpus").join(dir))
        .expect("corpus folder")
        .map(|e| e.expect("corpus entry").path())
        .collect();
    files.sort();
    assert!(files.len() >= 10, "the {dir} corpus looks empty");
    files
}

fn assert_refused(run: &ridgeline_tests::Run, path: &Path) {
    assert_eq!(run.code, Some(2), "{}: expected exit 2\n{}", path.display(), run.stderr);
    assert!(!run.stderr.contains("panicked"), "{}: {}", path.display(), run.stderr);
    for needle in expectations(path) {
        assert!(run.stderr.contains(&needle), "{}: missing `{needle}` in:\n{}", path.display(), run.stderr);
    }
}

#[test]
fn every_broken_config_in_the_corpus_is_refused_with_a_clear_message() {
    for path in corpus("config") {
        assert_refused(&ridgeline(&["check", "--config", path.to_str().unwrap()]), &path);
    }
}

#[test]
fn every_broken_plant_model_in_the_corpus_is_refused_with_a_clear_message() {
    let config = root().join("tests/corpus/valid-config.toml");
    for path in corpus("plant") {
        let run =
            ridgeline(&["rehearse", "--config", config.to_str().unwrap(), "--plant", path.to_str().unwrap()]);
        assert_refused(&run, &path);
    }
}

#[test]
fn the_corpus_bases_are_valid() {
    let config = root().join("tests/corpus/valid-config.toml");
    let plant = root().join("tests/corpus/valid-plant.toml");
    let run = ridgeline(&[
        "rehearse",
        "--config",
        config.to_str().unwrap(),
        "--plant",
        plant.to_str().unwrap(),
        "--duration",
        "10m",
    ]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
}

#[test]
fn bad_arguments_exit_with_2() {
    assert_eq!(ridgeline(&["rehearse", "--config", "a.toml"]).code, Some(2));
    let run = ridgeline(&["rehearse", "--config", "a", "--plant", "b", "--duration", "6"]);
    assert_eq!(run.code, Some(2));
    assert!(run.stderr.contains("needs a unit"), "{}", run.stderr);
    assert_eq!(ridgeline(&["frobnicate"]).code, Some(2));
}

/// Valid files with random damage: slices cut out, lines swapped, tokens inserted.
fn damaged(base: &'static str) -> impl Strategy<Value = String> {
    let token = prop::sample::select(vec![
        "[",
        "]",
        "[[",
        "=",
        "\"",
        "'",
        "{",
        "}",
        ",",
        "\n",
        "#",
        "-",
        "1e999",
        "nan",
        "inf",
        "0",
        "-0.0",
        "[[loops]]",
        "[loops.inputs]",
        "x = 1",
        "name = \"\"",
        "\u{feff}",
        "é",
        "0x10",
        "1_000",
        "true",
        "1979-05-27",
    ]);
    (prop::collection::vec((any::<prop::sample::Index>(), 0usize..40, token), 1..6)).prop_map(move |edits| {
        let mut text = base.to_owned();
        for (at, cut, token) in edits {
            let mut i = at.index(text.len() + 1);
            while !text.is_char_boundary(i) {
                i -= 1;
            }
            let mut j = (i + cut).min(text.len());
            while !text.is_char_boundary(j) {
                j -= 1;
            }
            text.replace_range(i..j, token);
        }
        text
    })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn damaged_configs_never_panic(text in damaged(include_str!("../corpus/valid-config.toml"))) {
        let _ = ridgeline::config::parse(&text, "fuzz.toml");
    }

    #[test]
    fn damaged_plant_models_never_panic(text in damaged(include_str!("../corpus/valid-plant.toml"))) {
        if let Ok(spec) = ridgeline::sim::parse(&text, "fuzz.toml") {
            // A model that parses must also run.
            let mut plant = ridgeline::sim::Plant::new(&spec);
            for _ in 0..10 {
                plant.step();
            }
        }
    }

    #[test]
    fn random_toml_like_text_never_panics(text in "[\\[\\]a-z_=\"'0-9., \\n{}#+-]{0,300}") {
        let _ = ridgeline::config::parse(&text, "fuzz.toml");
        let _ = ridgeline::sim::parse(&text, "fuzz.toml");
    }
}
