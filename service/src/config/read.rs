//! Typed reading of a TOML document that collects every problem, each with its key path
//! and line, instead of stopping at the first one.
//!
//! serde stops at the first unknown key or wrong type; an engineer fixing a config file
//! wants the whole list at once. So documents are parsed with spans kept and read
//! through [`Table`], which records problems in a shared [`Problems`] list and returns
//! `None` for what it could not read, letting the caller carry on with the rest.

use std::cell::RefCell;
use std::collections::HashMap;
use std::fmt;
use std::ops::Range;

use toml::Spanned;
use toml::de::{DeTable, DeValue};

/// One thing wrong with an input file.
#[derive(Debug, Clone, PartialEq)]
pub struct Problem {
    /// Key path such as `loops[0].inputs[1].bounds`; empty for document-level problems.
    pub path: String,
    /// 1-based line and column, where known.
    pub line: Option<(usize, usize)>,
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match (self.line, self.path.is_empty()) {
            (Some((line, col)), false) => {
                write!(f, "line {line}, column {col}: {}: {}", self.path, self.message)
            }
            (Some((line, col)), true) => write!(f, "line {line}, column {col}: {}", self.message),
            (None, false) => write!(f, "{}: {}", self.path, self.message),
            (None, true) => f.write_str(&self.message),
        }
    }
}

/// Every problem found in one file, in the order found.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub struct FileProblems {
    pub file: String,
    pub problems: Vec<Problem>,
}

impl fmt::Display for FileProblems {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, p) in self.problems.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{}: {p}", self.file)?;
        }
        Ok(())
    }
}

/// Collects problems while a document is read and validated, and remembers where each
/// key path sits in the text so that later checks can name the line too.
pub struct Problems<'s> {
    text: &'s str,
    list: RefCell<Vec<Problem>>,
    spans: RefCell<HashMap<String, Range<usize>>>,
}

impl<'s> Problems<'s> {
    pub fn new(text: &'s str) -> Self {
        Problems { text, list: RefCell::default(), spans: RefCell::default() }
    }

    /// Records a problem at `path`, with the line of that key when it was read.
    pub fn at(&self, path: &str, message: impl Into<String>) {
        let line = self.spans.borrow().get(path).map(|s| self.line_col(s.start));
        self.list.borrow_mut().push(Problem { path: path.to_owned(), line, message: message.into() });
    }

    fn at_span(&self, path: &str, span: Range<usize>, message: impl Into<String>) {
        let line = Some(self.line_col(span.start));
        self.list.borrow_mut().push(Problem { path: path.to_owned(), line, message: message.into() });
    }

    fn remember(&self, path: &str, span: Range<usize>) {
        self.spans.borrow_mut().insert(path.to_owned(), span);
    }

    pub fn is_empty(&self) -> bool {
        self.list.borrow().is_empty()
    }

    pub fn into_result<T>(self, file: &str, value: Option<T>) -> Result<T, FileProblems> {
        let mut problems = self.list.into_inner();
        // In file order, so an engineer can walk down the file; stable for equal lines.
        problems.sort_by_key(|p| p.line.unwrap_or((usize::MAX, 0)));
        match value {
            Some(value) if problems.is_empty() => Ok(value),
            _ => Err(FileProblems { file: file.to_owned(), problems }),
        }
    }

    /// 1-based line and column (in characters) of a byte offset.
    fn line_col(&self, offset: usize) -> (usize, usize) {
        let offset = floor_char_boundary(self.text, offset);
        let before = &self.text[..offset];
        let line = before.matches('\n').count() + 1;
        let line_start = before.rfind('\n').map_or(0, |i| i + 1);
        (line, before[line_start..].chars().count() + 1)
    }
}

fn floor_char_boundary(text: &str, mut offset: usize) -> usize {
    offset = offset.min(text.len());
    while !text.is_char_boundary(offset) {
        offset -= 1;
    }
    offset
}

/// Reads a file's text, or the one problem of not being able to; also returns the name
/// problems use for the file. Text that is not UTF-8 (which TOML requires) is refused at
/// the line and column of its first invalid byte.
pub fn read_file(path: &std::path::Path) -> Result<(String, String), FileProblems> {
    let file = path.display().to_string();
    let refuse = |line, message| {
        Err(FileProblems {
            file: file.clone(),
            problems: vec![Problem { path: String::new(), line, message }],
        })
    };
    let bytes = match std::fs::read(path) {
        Ok(bytes) => bytes,
        Err(e) => return refuse(None, format!("cannot read the file: {e}")),
    };
    match String::from_utf8(bytes) {
        Ok(text) => Ok((text, file)),
        Err(e) => {
            let at = e.utf8_error().valid_up_to();
            let bytes = e.as_bytes();
            let valid = std::str::from_utf8(&bytes[..at]).unwrap_or_default();
            let line = Problems::new(valid).line_col(at);
            refuse(
                Some(line),
                format!(
                    "cannot read the file: byte 0x{:02X} is not valid UTF-8 (TOML files are UTF-8 text)",
                    bytes[at]
                ),
            )
        }
    }
}

/// Reads a whole document: syntax, then `read` from the root table (which accepts the
/// `root_keys`), then `validate` on what was read, with every problem collected.
pub fn document<T>(
    text: &str,
    file: &str,
    root_keys: &[&str],
    read: impl FnOnce(&Table) -> Option<T>,
    validate: impl FnOnce(&T, &Problems),
) -> Result<T, FileProblems> {
    let problems = Problems::new(text);
    let value =
        parse_document(text, &problems).and_then(|doc| read(&Table::root(&doc, &problems, root_keys)));
    if let Some(value) = &value {
        validate(value, &problems);
    }
    problems.into_result(file, value)
}

/// Parses TOML text, recording every syntax error; `None` when there was any.
pub fn parse_document<'i>(text: &'i str, problems: &Problems<'_>) -> Option<Spanned<DeTable<'i>>> {
    let (doc, errors) = DeTable::parse_recoverable(text);
    for e in &errors {
        let message = e.message().trim_end().to_owned();
        match e.span() {
            Some(span) => problems.at_span("", span, format!("TOML syntax: {message}")),
            None => problems.at("", format!("TOML syntax: {message}")),
        }
    }
    errors.is_empty().then_some(doc)
}

/// A TOML table being read: knows its key path, the keys it accepts, and reports
/// unknown keys as soon as it is opened.
pub struct Table<'a, 'i, 's> {
    path: String,
    span: Range<usize>,
    entries: &'a DeTable<'i>,
    problems: &'a Problems<'s>,
}

impl<'a, 'i, 's> Table<'a, 'i, 's> {
    /// Opens the top-level table of a document.
    pub fn root(doc: &'a Spanned<DeTable<'i>>, problems: &'a Problems<'s>, known: &[&str]) -> Self {
        let t = Table { path: String::new(), span: doc.span(), entries: doc.get_ref(), problems };
        t.check_keys(known);
        t
    }

    pub fn path(&self) -> &str {
        &self.path
    }

    pub fn problems(&self) -> &'a Problems<'s> {
        self.problems
    }

    fn child_path(&self, key: &str) -> String {
        if self.path.is_empty() { key.to_owned() } else { format!("{}.{key}", self.path) }
    }

    fn check_keys(&self, known: &[&str]) {
        for (key, value) in self.entries.iter() {
            let key_str: &str = key.get_ref();
            let path = self.child_path(key_str);
            self.problems.remember(&path, value.span());
            if !known.contains(&key_str) {
                let hint = match known {
                    [] => String::new(),
                    _ => format!(" (expected one of: {})", known.join(", ")),
                };
                self.problems.at_span(&path, key.span(), format!("unknown key `{key_str}`{hint}"));
            }
        }
    }

    fn get(&self, key: &str) -> Option<&'a Spanned<DeValue<'i>>> {
        self.entries.get(key)
    }

    /// Reports a problem about this table as a whole.
    pub fn problem(&self, message: impl Into<String>) {
        self.problems.at_span(&self.path, self.span.clone(), message);
    }

    /// Reports a problem about one of this table's keys.
    pub fn problem_at(&self, key: &str, message: impl Into<String>) {
        self.problems.at(&self.child_path(key), message);
    }

    /// A key that must be present.
    pub fn req<T: FromToml>(&self, key: &str) -> Option<T> {
        if self.get(key).is_none() {
            self.problem(format!("missing key `{key}` ({})", T::EXPECTED));
        }
        self.opt(key)
    }

    /// A key that may be absent; `None` when absent or unreadable (the latter is recorded).
    pub fn opt<T: FromToml>(&self, key: &str) -> Option<T> {
        let value = self.get(key)?;
        let path = self.child_path(key);
        read_value(value, &path, self.problems)
    }

    /// A required expression (an objective, a constraint's value, a plant output),
    /// parsed; a syntax error is recorded at the key with the expression quoted.
    pub fn expr(&self, key: &str) -> Option<crate::expr::Expr> {
        let src: String = self.req(key)?;
        crate::expr::Expr::parse(&src).map_err(|e| self.problem_at(key, format!("`{src}`: {e}"))).ok()
    }

    /// A key with a default for when it is absent.
    pub fn or<T: FromToml>(&self, key: &str, default: T) -> Option<T> {
        match self.get(key) {
            None => Some(default),
            Some(_) => self.opt(key),
        }
    }

    /// Whether the key is present at all, readable or not.
    pub fn has(&self, key: &str) -> bool {
        self.get(key).is_some()
    }

    /// A sub-table; `None` when absent or not a table (the latter is recorded).
    pub fn table(&self, key: &str, known: &[&str]) -> Option<Table<'a, 'i, 's>> {
        let value = self.get(key)?;
        self.open(value, self.child_path(key), known)
    }

    /// An array of tables (`[[key]]`), each opened with the same known keys.
    pub fn tables(&self, key: &str, known: &[&str]) -> Vec<Table<'a, 'i, 's>> {
        let Some(value) = self.get(key) else { return Vec::new() };
        let path = self.child_path(key);
        match value.get_ref() {
            DeValue::Array(items) => items
                .iter()
                .enumerate()
                .filter_map(|(i, item)| self.open(item, format!("{path}[{i}]"), known))
                .collect(),
            other => {
                self.problems
                    .at(&path, format!("expected an array of tables ([[{key}]]), found {}", kind(other)));
                Vec::new()
            }
        }
    }

    /// A table of named values such as `move = { a = "up", b = "down" }`, in file order;
    /// `None` when absent, not a table, or any value is unreadable (all recorded).
    pub fn map<T: FromToml>(&self, key: &str) -> Option<Vec<(String, T)>> {
        let value = self.get(key)?;
        let path = self.child_path(key);
        match value.get_ref() {
            DeValue::Table(entries) => {
                let read: Vec<Option<(String, T)>> = entries
                    .iter()
                    .map(|(key, item)| {
                        let name: &str = key.get_ref();
                        let child = format!("{path}.{name}");
                        // Later rules about this entry (an unknown input) point at its name.
                        self.problems.remember(&child, key.span());
                        read_value(item, &child, self.problems).map(|v| (name.to_owned(), v))
                    })
                    .collect();
                read.into_iter().collect()
            }
            other => self.not_a_table(&path, value, other),
        }
    }

    /// A table of named tables (`[key.name]`), in file order.
    pub fn named_tables(&self, key: &str, known: &[&str]) -> Vec<(String, Table<'a, 'i, 's>)> {
        let Some(value) = self.get(key) else { return Vec::new() };
        let path = self.child_path(key);
        match value.get_ref() {
            DeValue::Table(entries) => entries
                .iter()
                .filter_map(|(name, item)| {
                    let name: &str = name.get_ref();
                    let child = format!("{path}.{name}");
                    self.problems.remember(&child, item.span());
                    self.open(item, child, known).map(|t| (name.to_owned(), t))
                })
                .collect(),
            other => {
                self.problems.at(
                    &path,
                    format!("expected a table of named tables ([{key}.<name>]), found {}", kind(other)),
                );
                Vec::new()
            }
        }
    }

    fn open(
        &self,
        value: &'a Spanned<DeValue<'i>>,
        path: String,
        known: &[&str],
    ) -> Option<Table<'a, 'i, 's>> {
        match value.get_ref() {
            DeValue::Table(entries) => {
                self.problems.remember(&path, value.span());
                let t = Table { path, span: value.span(), entries, problems: self.problems };
                t.check_keys(known);
                Some(t)
            }
            other => self.not_a_table(&path, value, other),
        }
    }

    fn not_a_table<T>(&self, path: &str, value: &Spanned<DeValue<'i>>, found: &DeValue<'_>) -> Option<T> {
        self.problems.at_span(path, value.span(), format!("expected a table, found {}", kind(found)));
        None
    }
}

fn read_value<T: FromToml>(value: &Spanned<DeValue<'_>>, path: &str, problems: &Problems<'_>) -> Option<T> {
    match T::from_toml(value.get_ref(), path, problems) {
        Ok(v) => Some(v),
        Err(Mismatch(message)) => {
            problems.at_span(path, value.span(), message);
            None
        }
    }
}

fn kind(value: &DeValue<'_>) -> &'static str {
    match value {
        DeValue::String(_) => "a string",
        DeValue::Integer(_) => "an integer",
        DeValue::Float(_) => "a number",
        DeValue::Boolean(_) => "a boolean",
        DeValue::Datetime(_) => "a date-time",
        DeValue::Array(_) => "an array",
        DeValue::Table(_) => "a table",
    }
}

/// Why a value could not be read as the wanted type (without the path, which the reader adds).
pub struct Mismatch(pub String);

impl Mismatch {
    fn expected(what: &str, found: &DeValue<'_>) -> Self {
        Mismatch(format!("expected {what}, found {}", kind(found)))
    }
}

/// A type that can be read from one TOML value.
pub trait FromToml: Sized {
    /// What the value should look like, for messages (`a number`, `"text" or "json"`).
    const EXPECTED: &'static str;
    fn from_toml(value: &DeValue<'_>, path: &str, problems: &Problems<'_>) -> Result<Self, Mismatch>;
}

impl FromToml for f64 {
    const EXPECTED: &'static str = "a number";
    fn from_toml(value: &DeValue<'_>, _: &str, _: &Problems<'_>) -> Result<Self, Mismatch> {
        let parsed = match value {
            DeValue::Float(f) => f.as_str().parse::<f64>().ok(),
            DeValue::Integer(i) => i64::from_str_radix(i.as_str(), i.radix()).ok().map(|i| i as f64),
            other => return Err(Mismatch::expected(Self::EXPECTED, other)),
        };
        match parsed {
            Some(v) if v.is_finite() => Ok(v),
            Some(_) => Err(Mismatch("expected a finite number, found inf or nan".into())),
            None => Err(Mismatch("expected a number that fits in 64 bits".into())),
        }
    }
}

fn integer(value: &DeValue<'_>, what: &str) -> Result<i128, Mismatch> {
    match value {
        DeValue::Integer(i) => {
            i128::from_str_radix(i.as_str(), i.radix()).map_err(|_| Mismatch(format!("expected {what}")))
        }
        other => Err(Mismatch::expected(what, other)),
    }
}

macro_rules! integer_from_toml {
    ($($t:ty => $what:literal),* $(,)?) => {$(
        impl FromToml for $t {
            const EXPECTED: &'static str = $what;
            fn from_toml(value: &DeValue<'_>, _: &str, _: &Problems<'_>) -> Result<Self, Mismatch> {
                let i = integer(value, $what)?;
                <$t>::try_from(i).map_err(|_| Mismatch(format!("expected {}, found {i}", $what)))
            }
        }
    )*};
}

integer_from_toml! {
    u8 => "a whole number from 0 to 255",
    u16 => "a whole number from 0 to 65535",
    u32 => "a whole number from 0 to 4294967295",
    u64 => "a whole number from 0 to 18446744073709551615",
}

impl FromToml for bool {
    const EXPECTED: &'static str = "true or false";
    fn from_toml(value: &DeValue<'_>, _: &str, _: &Problems<'_>) -> Result<Self, Mismatch> {
        match value {
            DeValue::Boolean(b) => Ok(*b),
            other => Err(Mismatch::expected(Self::EXPECTED, other)),
        }
    }
}

impl FromToml for String {
    const EXPECTED: &'static str = "a string";
    fn from_toml(value: &DeValue<'_>, _: &str, _: &Problems<'_>) -> Result<Self, Mismatch> {
        match value {
            DeValue::String(s) => Ok(s.to_string()),
            other => Err(Mismatch::expected(Self::EXPECTED, other)),
        }
    }
}

/// A pair such as `limits = [1.0, 1.6]`.
impl FromToml for [f64; 2] {
    const EXPECTED: &'static str = "a pair of numbers like [1.0, 2.0]";
    fn from_toml(value: &DeValue<'_>, path: &str, problems: &Problems<'_>) -> Result<Self, Mismatch> {
        match value {
            DeValue::Array(items) if items.len() == 2 => {
                let mut pair = [0.0; 2];
                for (slot, item) in pair.iter_mut().zip(items.iter()) {
                    *slot = f64::from_toml(item.get_ref(), path, problems)?;
                }
                Ok(pair)
            }
            DeValue::Array(items) => {
                Err(Mismatch(format!("expected a pair of numbers, found {} items", items.len())))
            }
            other => Err(Mismatch::expected(Self::EXPECTED, other)),
        }
    }
}

/// Declares an enum read from a fixed set of strings, with `as_str` for messages and output.
macro_rules! string_enum {
    ($(#[$meta:meta])* $vis:vis enum $name:ident { $($(#[$vmeta:meta])* $variant:ident = $text:literal),+ $(,)? }) => {
        $(#[$meta])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
        $vis enum $name { $($(#[$vmeta])* $variant),+ }

        impl $name {
            pub const ALL: &'static [$name] = &[$($name::$variant),+];
            pub fn as_str(self) -> &'static str {
                match self { $($name::$variant => $text),+ }
            }
        }

        impl std::fmt::Display for $name {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.as_str())
            }
        }

        impl std::str::FromStr for $name {
            type Err = String;
            fn from_str(s: &str) -> Result<Self, String> {
                match s {
                    $($text => Ok($name::$variant),)+
                    other => Err(format!(
                        "`{other}` is not one of {}",
                        [$(concat!("\"", $text, "\"")),+].join(", ")
                    )),
                }
            }
        }

        impl $crate::config::read::FromToml for $name {
            const EXPECTED: &'static str = concat!("one of" $(, " \"", $text, "\"")+);
            fn from_toml(
                value: &toml::de::DeValue<'_>,
                path: &str,
                problems: &$crate::config::read::Problems<'_>,
            ) -> Result<Self, $crate::config::read::Mismatch> {
                let s = String::from_toml(value, path, problems)?;
                s.parse().map_err($crate::config::read::Mismatch)
            }
        }
    };
}
pub(crate) use string_enum;

#[cfg(test)]
mod tests {
    use super::*;

    fn read(text: &str, f: impl FnOnce(&Table)) -> Vec<String> {
        let problems = Problems::new(text);
        if let Some(doc) = parse_document(text, &problems) {
            let t = Table::root(&doc, &problems, &["a", "b", "sub"]);
            f(&t);
        }
        problems.list.into_inner().iter().map(ToString::to_string).collect()
    }

    #[test]
    fn every_unknown_key_is_reported_with_its_line() {
        let found = read("a = 1\nzz = 2\n[sub]\nyy = 3\n", |t| {
            t.table("sub", &["x"]);
        });
        assert_eq!(found.len(), 2, "{found:?}");
        assert!(found[0].starts_with("line 2, column 1: zz: unknown key `zz`"), "{found:?}");
        assert!(found[1].starts_with("line 4, column 1: sub.yy: unknown key `yy`"), "{found:?}");
    }

    #[test]
    fn wrong_types_and_missing_keys_are_all_reported() {
        let found = read("a = \"x\"\n", |t| {
            let _: Option<f64> = t.req("a");
            let _: Option<f64> = t.req("b");
        });
        assert_eq!(
            found,
            vec![
                "line 1, column 5: a: expected a number, found a string",
                "line 1, column 1: missing key `b` (a number)"
            ]
        );
    }

    #[test]
    fn syntax_errors_carry_line_and_column() {
        let found = read("a = 1\nb = [1,\n", |_| {});
        assert!(!found.is_empty());
        assert!(found[0].starts_with("line 2") || found[0].starts_with("line 3"), "{found:?}");
        assert!(found[0].contains("TOML syntax"), "{found:?}");
    }

    #[test]
    fn integers_are_accepted_as_numbers_but_not_the_reverse() {
        let found = read("a = 2\nb = 2.5\n", |t| {
            assert_eq!(t.req::<f64>("a"), Some(2.0));
            assert_eq!(t.req::<u16>("b"), None);
        });
        assert_eq!(found.len(), 1);
        assert!(found[0].contains("b: expected a whole number"), "{found:?}");
    }

    #[test]
    fn out_of_range_integers_name_the_range() {
        let found = read("a = 70000\n", |t| {
            assert_eq!(t.req::<u16>("a"), None);
        });
        assert!(found[0].contains("from 0 to 65535, found 70000"), "{found:?}");
    }
}
