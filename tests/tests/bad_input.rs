//! Broken input files: a clear message and exit 2 for each, and no panic on any input.
//! Damaged and arbitrary files, as text or as bytes read from disk, are read or refused,
//! and every problem of a refusal says where it is: a key path, or a line and column
//! that lie inside the file.

use std::path::{Path, PathBuf};

use proptest::prelude::*;
use proptest::test_runner::TestCaseError;
use ridgeline::config::FileProblems;
use ridgeline_tests::{Run, ridgeline};

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

const CONFIG: &str = include_str!("../corpus/valid-config.toml");
const PLANT: &str = include_str!("../corpus/valid-plant.toml");

/// Text that TOML and the readers give meaning to, for inserting into valid files.
fn token() -> impl Strategy<Value = &'static str> {
    prop::sample::select(vec![
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
    ])
}

/// Valid files with random damage: slices cut out, tokens inserted.
fn damaged(base: &'static str) -> impl Strategy<Value = String> {
    (prop::collection::vec((any::<prop::sample::Index>(), 0usize..40, token()), 1..6)).prop_map(
        move |edits| {
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
        },
    )
}

/// Bytes that trip decoders: invalid UTF-8 (RFC 3629 §3: a stray continuation byte, a lead
/// byte cut short, an overlong form, a surrogate, a code point past U+10FFFF), NUL and
/// other control characters, a byte-order mark, line ends, and numbers past every range.
fn nasty_bytes() -> impl Strategy<Value = Vec<u8>> {
    let known: Vec<&'static [u8]> = vec![
        b"\xff",
        b"\x80",
        b"\xfe\xff",
        b"\xc3",
        b"\xc0\xaf",
        b"\xed\xa0\x80",
        b"\xf4\x90\x80\x80",
        b"\x00",
        b"\x7f",
        b"\x1b[31m",
        b"\xef\xbb\xbf",
        b"\r",
        b"\r\n",
        b"\t",
        b"1e999999",
        b"-1e-999999",
        b"99999999999999999999999999999",
        b"-9223372036854775809",
        b"18446744073709551616",
        b"0x7FFFFFFFFFFFFFFFFF",
        b"4294967296",
        b"65536",
        b"-1",
        b"1.7976931348623157e309",
        b"-nan",
        b"+inf",
    ];
    prop_oneof![
        3 => prop::sample::select(known).prop_map(<[u8]>::to_vec),
        1 => prop::collection::vec(any::<u8>(), 1..8),
    ]
}

/// Valid files with random damage at the byte level, through nasty bytes and tokens.
fn damaged_bytes(base: &'static str) -> impl Strategy<Value = Vec<u8>> {
    let insert = prop_oneof![3 => nasty_bytes(), 2 => token().prop_map(|t| t.as_bytes().to_vec())];
    prop::collection::vec((any::<prop::sample::Index>(), 0usize..40, insert), 1..6).prop_map(move |edits| {
        let mut bytes = base.as_bytes().to_vec();
        for (at, cut, insert) in edits {
            let i = at.index(bytes.len() + 1);
            let j = (i + cut).min(bytes.len());
            bytes.splice(i..j, insert);
        }
        bytes
    })
}

/// Valid files with one number changed to an edge value: files that still parse, and
/// are then refused by a rule, or fit and run.
fn renumbered(base: &'static str) -> impl Strategy<Value = String> {
    let value = prop::sample::select(vec![
        "0", "-1", "1", "0.001", "0.25", "2", "3.5", "60", "65534", "65535", "65536", "1e300", "-1e300",
        "1e-300",
    ]);
    (any::<prop::sample::Index>(), value).prop_map(move |(at, value)| {
        let numbers: Vec<(usize, usize)> = number_spans(base);
        let (i, j) = numbers[at.index(numbers.len())];
        format!("{}{value}{}", &base[..i], &base[j..])
    })
}

/// Where the numbers of a value (after `=` or inside `[...]`) are in `text`.
fn number_spans(text: &str) -> Vec<(usize, usize)> {
    let mut spans = Vec::new();
    for (line_start, line) in text.split_inclusive('\n').scan(0, |at, l| {
        let start = *at;
        *at += l.len();
        Some((start, l))
    }) {
        if line.starts_with('#') || !line.contains('=') {
            continue;
        }
        let bytes = line.as_bytes();
        let mut k = line.find('=').expect("a value") + 1;
        while k < bytes.len() {
            let number = |c: u8| c.is_ascii_digit() || c == b'.' || c == b'-';
            if number(bytes[k]) && (k == 0 || !bytes[k - 1].is_ascii_alphanumeric() && bytes[k - 1] != b'_') {
                let end = k + bytes[k..].iter().take_while(|&&c| number(c)).count();
                spans.push((line_start + k, line_start + end));
                k = end;
            } else {
                k += 1;
            }
        }
    }
    assert!(spans.len() >= 5, "the base has too few numbers to change");
    spans
}

/// Any bytes at all.
fn arbitrary_bytes() -> impl Strategy<Value = Vec<u8>> {
    prop::collection::vec(any::<u8>(), 0..600)
}

/// `bytes` written to `fuzz.toml` in a fresh folder (kept alive by the returned guard).
fn on_disk(bytes: &[u8]) -> (tempfile::TempDir, PathBuf, String) {
    let dir = tempfile::tempdir().expect("a temp dir");
    let path = dir.path().join("fuzz.toml");
    std::fs::write(&path, bytes).expect("scratch file is writable");
    let file = path.display().to_string();
    (dir, path, file)
}

/// Every problem of a refusal says where it is: a key path, or a line and column, and a
/// line and column, when given, lie inside the file (1-based, the column in characters,
/// at most one past the line's end). The rendered refusal leads each problem with the
/// file and then that place.
fn names_where(refusal: &FileProblems, file: &str, text: &str) -> Result<(), TestCaseError> {
    prop_assert_eq!(&refusal.file, file);
    prop_assert!(!refusal.problems.is_empty(), "a refusal without a problem");
    let lines: Vec<&str> = text.split('\n').collect();
    let rendered = refusal.to_string();
    for p in &refusal.problems {
        prop_assert!(!p.message.is_empty(), "{:?}", p);
        prop_assert!(p.line.is_some() || !p.path.is_empty(), "{:?} says neither a key nor a line", p);
        let place = match p.line {
            Some((line, column)) => {
                prop_assert!(
                    (1..=lines.len()).contains(&line),
                    "{:?}: the file has {} lines",
                    p,
                    lines.len()
                );
                let width = lines[line - 1].chars().count();
                prop_assert!(
                    (1..=width + 1).contains(&column),
                    "{:?}: line {} has {} characters",
                    p,
                    line,
                    width
                );
                format!("{file}: line {line}, column {column}: ")
            }
            None => format!("{file}: {}: ", p.path),
        };
        prop_assert!(rendered.contains(&place), "`{}` missing from:\n{}", place, rendered);
    }
    Ok(())
}

/// A plant model that parses also runs.
fn runs(spec: &ridgeline::sim::PlantSpec) {
    let mut plant = ridgeline::sim::Plant::new(spec);
    for _ in 0..10 {
        plant.step();
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn damaged_configs_are_read_or_refused_naming_where(text in damaged(CONFIG)) {
        if let Err(refusal) = ridgeline::config::parse(&text, "fuzz.toml") {
            names_where(&refusal, "fuzz.toml", &text)?;
        }
    }

    #[test]
    fn damaged_plant_models_are_read_or_refused_naming_where(text in damaged(PLANT)) {
        match ridgeline::sim::parse(&text, "fuzz.toml") {
            Ok(spec) => runs(&spec),
            Err(refusal) => names_where(&refusal, "fuzz.toml", &text)?,
        }
    }

    #[test]
    fn renumbered_configs_are_read_or_refused_naming_where(text in renumbered(CONFIG)) {
        if let Err(refusal) = ridgeline::config::parse(&text, "fuzz.toml") {
            names_where(&refusal, "fuzz.toml", &text)?;
        }
    }

    #[test]
    fn renumbered_plant_models_are_read_or_refused_naming_where(text in renumbered(PLANT)) {
        match ridgeline::sim::parse(&text, "fuzz.toml") {
            Ok(spec) => runs(&spec),
            Err(refusal) => names_where(&refusal, "fuzz.toml", &text)?,
        }
    }

    #[test]
    fn random_toml_like_text_is_refused_naming_where(text in "[\\[\\]a-z_=\"'0-9., \\n{}#+-]{0,300}") {
        if let Err(refusal) = ridgeline::config::parse(&text, "fuzz.toml") {
            names_where(&refusal, "fuzz.toml", &text)?;
        }
        match ridgeline::sim::parse(&text, "fuzz.toml") {
            Ok(spec) => runs(&spec),
            Err(refusal) => names_where(&refusal, "fuzz.toml", &text)?,
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 1000, ..ProptestConfig::default() })]

    /// Through `config::load`, the reader `check`, `run` and `rehearse` use: from disk, bytes first.
    #[test]
    fn damaged_config_files_on_disk_are_read_or_refused_naming_where(bytes in damaged_bytes(CONFIG)) {
        let (_dir, path, file) = on_disk(&bytes);
        if let Err(refusal) = ridgeline::config::load(&path) {
            names_where(&refusal, &file, &String::from_utf8_lossy(&bytes))?;
        }
    }

    /// Through `sim::load`, the reader `sim` and `rehearse` use.
    #[test]
    fn damaged_plant_model_files_on_disk_are_read_or_refused_naming_where(bytes in damaged_bytes(PLANT)) {
        let (_dir, path, file) = on_disk(&bytes);
        match ridgeline::sim::load(&path) {
            Ok(spec) => runs(&spec),
            Err(refusal) => names_where(&refusal, &file, &String::from_utf8_lossy(&bytes))?,
        }
    }

    #[test]
    fn files_of_arbitrary_bytes_are_refused_naming_where(bytes in arbitrary_bytes()) {
        let (_dir, path, file) = on_disk(&bytes);
        let text = String::from_utf8_lossy(&bytes);
        if let Err(refusal) = ridgeline::config::load(&path) {
            names_where(&refusal, &file, &text)?;
        }
        match ridgeline::sim::load(&path) {
            Ok(spec) => runs(&spec),
            Err(refusal) => names_where(&refusal, &file, &text)?,
        }
    }
}

/// What the binary printed about `file`: exit 0, or exit 2 with its problems on stderr,
/// each leading with the file and a line and column or a key path, then a line counting
/// them. Never a panic (exit 101).
fn binary_names_where(run: &Run, files: &[&str]) -> Result<(), TestCaseError> {
    prop_assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
    match run.code {
        Some(0) => return Ok(()),
        Some(2) => {}
        other => {
            return Err(TestCaseError::fail(format!("exit {other:?}, expected 0 or 2:\n{}", run.stderr)));
        }
    }
    let mut counted = 0;
    for file in files {
        let prefix = format!("{file}: ");
        let lines: Vec<&str> = run.stderr.lines().filter_map(|l| l.strip_prefix(prefix.as_str())).collect();
        let Some((count, problems)) = lines.split_last() else { continue };
        let n: usize = count
            .strip_suffix(" problems")
            .or_else(|| count.strip_suffix(" problem"))
            .and_then(|n| n.parse().ok())
            .ok_or_else(|| TestCaseError::fail(format!("no problem count for {file}:\n{}", run.stderr)))?;
        prop_assert_eq!(problems.len(), n, "{}", run.stderr);
        for p in problems {
            let placed = match p.strip_prefix("line ") {
                Some(rest) => {
                    rest.split_once(": ").and_then(|(at, _)| at.split_once(", column ")).is_some_and(
                        |(line, column)| line.parse::<usize>().is_ok() && column.parse::<usize>().is_ok(),
                    )
                }
                None => {
                    p.split_once(": ").is_some_and(|(path, _)| !path.is_empty() && !path.starts_with(' '))
                }
            };
            prop_assert!(placed, "`{}` names neither a line nor a key:\n{}", p, run.stderr);
        }
        counted += n;
    }
    prop_assert!(counted > 0, "exit 2 without a problem:\n{}", run.stderr);
    Ok(())
}

proptest! {
    // Each case starts the binary: fewer cases than the library properties above.
    #![proptest_config(ProptestConfig { cases: 150, ..ProptestConfig::default() })]

    #[test]
    fn ridgeline_check_exits_0_or_2_naming_where_on_damaged_files(
        bytes in prop_oneof![
            2 => renumbered(CONFIG).prop_map(String::into_bytes),
            2 => damaged(CONFIG).prop_map(String::into_bytes),
            2 => damaged_bytes(CONFIG),
            1 => arbitrary_bytes(),
        ],
    ) {
        let (_dir, _path, file) = on_disk(&bytes);
        binary_names_where(&ridgeline(&["check", "--config", &file]), &[&file])?;
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 60, ..ProptestConfig::default() })]

    /// `rehearse` reads the plant model (as `sim` does) and, when it fits the config, runs it.
    #[test]
    fn ridgeline_rehearse_exits_0_or_2_naming_where_on_damaged_plant_models(
        bytes in prop_oneof![
            2 => renumbered(PLANT).prop_map(String::into_bytes),
            2 => damaged(PLANT).prop_map(String::into_bytes),
            2 => damaged_bytes(PLANT),
            1 => arbitrary_bytes(),
        ],
    ) {
        let (_dir, _path, file) = on_disk(&bytes);
        let config = root().join("tests/corpus/valid-config.toml").display().to_string();
        let run = ridgeline(&["rehearse", "--config", &config, "--plant", &file, "--duration", "2m"]);
        binary_names_where(&run, &[&file, &config])?;
    }
}

#[test]
fn a_file_that_is_not_utf8_is_refused_at_the_line_and_column_of_its_first_bad_byte() {
    // Source: TOML v1.0.0 ("A TOML file must be a valid UTF-8 encoded Unicode document")
    // and RFC 3629 §3: 0xE9 (Latin-1 'é') is a lead byte that needs continuation bytes.
    let (_dir, _path, file) = on_disk(b"[service]\nlisten = \"caf\xe9:8080\"\n");
    let run = ridgeline(&["check", "--config", &file]);
    assert_eq!(run.code, Some(2), "{}", run.stderr);
    let expected = format!(
        "{file}: line 2, column 14: cannot read the file: byte 0xE9 is not valid UTF-8 (TOML files are UTF-8 text)"
    );
    assert!(run.stderr.contains(&expected), "`{expected}` missing from:\n{}", run.stderr);
}

#[test]
fn a_file_saved_with_a_byte_order_mark_is_read_like_one_without() {
    // Common practice (from memory): editors on Windows save UTF-8 with a leading U+FEFF
    // (Unicode §23.8, "Byte Order Mark"); the toml crate skips it at the start of a document.
    let (_dir, _path, file) = on_disk(&[b"\xef\xbb\xbf", CONFIG.as_bytes()].concat());
    let run = ridgeline(&["check", "--config", &file]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    assert!(run.stdout.contains("valid, 1 loop"), "{}", run.stdout);
    // Anywhere else it is a character TOML does not allow there, placed like any other.
    let (_dir, _path, file) = on_disk(&[CONFIG.as_bytes(), b"\xef\xbb\xbf"].concat());
    let run = ridgeline(&["check", "--config", &file]);
    assert_eq!(run.code, Some(2), "{}", run.stderr);
    let last = CONFIG.lines().count() + 1;
    assert!(run.stderr.contains(&format!("{file}: line {last}, column 1: TOML syntax")), "{}", run.stderr);
}
