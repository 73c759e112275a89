//! Config-file arithmetic expressions, compiled once to postfix code and evaluated allocation-free.

use std::collections::HashMap;
use std::fmt;

/// Deepest nesting of parentheses, signs, powers and calls; keeps parser recursion bounded.
const MAX_DEPTH: usize = 64;
/// Size of the evaluation stack; `parse` rejects programs that would need more.
const MAX_STACK: usize = 64;
/// Stack size for the common small expressions; zeroing 64 slots would cost more than evaluating.
const SMALL_STACK: usize = 16;
/// Largest |n| for which a constant integer exponent uses `powi`.
const MAX_POWI: f64 = 64.0;
const FUNCTIONS: &str = "min, max, abs, sqrt, exp, ln";

/// A parsed expression: its source text, its variables and a compiled postfix program.
#[derive(Debug, Clone)]
pub struct Expr {
    source: String,
    names: Vec<String>,
    name_columns: Vec<usize>,
    code: Vec<Op>,
    max_stack: usize,
}

/// Why an expression failed to parse, and where.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{message} at column {column}")]
pub struct ExprError {
    /// 1-based character position in the source.
    pub column: usize,
    /// A sentence describing the problem.
    pub message: String,
}

/// Postfix instructions. Binary operators with a constant or variable operand are fused into one
/// instruction (`SubC` is `top - c`, `RSubC` is `c - top`): fewer dispatches and no stack traffic.
#[derive(Debug, Clone, Copy)]
enum Op {
    Const(f64),
    Var(usize),
    Neg,
    Abs,
    Sqrt,
    Exp,
    Ln,
    PowI(i32),
    AddC(f64),
    SubC(f64),
    RSubC(f64),
    MulC(f64),
    DivC(f64),
    RDivC(f64),
    AddV(usize),
    SubV(usize),
    RSubV(usize),
    MulV(usize),
    DivV(usize),
    RDivV(usize),
    Add,
    Sub,
    Mul,
    Div,
    Pow,
    Min,
    Max,
}

impl Op {
    /// Number of stack values the op consumes (it always leaves one).
    fn arity(self) -> usize {
        match self {
            Op::Const(_) | Op::Var(_) => 0,
            Op::Add | Op::Sub | Op::Mul | Op::Div | Op::Pow | Op::Min | Op::Max => 2,
            _ => 1,
        }
    }

    fn reads_var(self) -> bool {
        use Op::{AddV, DivV, MulV, RDivV, RSubV, SubV, Var};
        matches!(self, Var(_) | AddV(_) | SubV(_) | RSubV(_) | MulV(_) | DivV(_) | RDivV(_))
    }

    /// The single instruction for binary `self` with `leaf` as its left or right operand.
    /// Swapping the operands of `+` and `*` is exact in IEEE arithmetic.
    fn fuse(self, leaf: Op, leaf_is_left: bool) -> Option<Op> {
        Some(match (self, leaf, leaf_is_left) {
            (Op::Add, Op::Const(c), _) => Op::AddC(c),
            (Op::Add, Op::Var(i), _) => Op::AddV(i),
            (Op::Mul, Op::Const(c), _) => Op::MulC(c),
            (Op::Mul, Op::Var(i), _) => Op::MulV(i),
            (Op::Sub, Op::Const(c), false) => Op::SubC(c),
            (Op::Sub, Op::Var(i), false) => Op::SubV(i),
            (Op::Sub, Op::Const(c), true) => Op::RSubC(c),
            (Op::Sub, Op::Var(i), true) => Op::RSubV(i),
            (Op::Div, Op::Const(c), false) => Op::DivC(c),
            (Op::Div, Op::Var(i), false) => Op::DivV(i),
            (Op::Div, Op::Const(c), true) => Op::RDivC(c),
            (Op::Div, Op::Var(i), true) => Op::RDivV(i),
            (Op::Pow, Op::Const(e), false) if e.fract() == 0.0 && e.abs() <= MAX_POWI => Op::PowI(e as i32),
            _ => return None,
        })
    }
}

impl Expr {
    /// Parses `source`, reporting the first problem with its column.
    ///
    /// A decimal point needs digits after it: `.5` and `2.5` are numbers, `2.` is refused.
    /// A `^` whose exponent is constant (after folding) with an integer value of at most 64 in
    /// magnitude uses `powi`; any other exponent uses `powf`.
    pub fn parse(source: &str) -> Result<Expr, ExprError> {
        let mut p = Parser {
            src: source,
            pos: 0,
            col: 1,
            tok: Token { kind: Kind::End, col: 1, text: "" },
            depth: 0,
            stack: 0,
            max_stack: 0,
            code: Vec::new(),
            names: Vec::new(),
            name_columns: Vec::new(),
            index: HashMap::new(),
        };
        p.advance()?;
        if p.tok.kind == Kind::End {
            return err(1, "empty expression");
        }
        p.expr()?;
        match p.tok.kind {
            Kind::End => Ok(Expr {
                source: source.to_string(),
                names: p.names,
                name_columns: p.name_columns,
                code: p.code,
                max_stack: p.max_stack,
            }),
            Kind::RParen => err(p.tok.col, "unbalanced ')' with no '(' to close"),
            _ => {
                let found = p.tok.describe();
                err(p.tok.col, format!("unexpected {found} after the end of the expression"))
            }
        }
    }

    /// The text the expression was parsed from.
    pub fn source(&self) -> &str {
        &self.source
    }

    /// Distinct variable names in order of first appearance; `eval` takes values in this order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// 1-based column of the first appearance of `names()[i]`, or 0 if `i` is out of range.
    pub fn name_column(&self, i: usize) -> usize {
        self.name_columns.get(i).copied().unwrap_or(0)
    }

    /// Evaluates with `values[i]` bound to `names()[i]`. No allocation. If `values` is shorter
    /// than `names()`, missing values read as NaN (never panic).
    ///
    /// Arithmetic follows IEEE 754 (`1/0` is infinite, `ln(-1)` is NaN); `min`/`max` return NaN
    /// when any argument is NaN, and the first argument on ties.
    pub fn eval(&self, values: &[f64]) -> f64 {
        if self.max_stack <= SMALL_STACK {
            run::<SMALL_STACK>(&self.code, values)
        } else {
            run::<MAX_STACK>(&self.code, values)
        }
    }
}

impl fmt::Display for Expr {
    /// Prints the source text.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.source)
    }
}

// Own min/max instead of f64::min/max, for two reasons: those skip a NaN argument, which would
// hide a failed measurement from the watchdog (`max(flow_a, flow_b)` must not stay finite when one
// flow is NaN); and they may return either zero for (-0.0, 0.0), which could make results depend on
// inlining and constant folding.
fn min(a: f64, b: f64) -> f64 {
    if a.is_nan() || !(b.is_nan() || b < a) { a } else { b }
}

fn max(a: f64, b: f64) -> f64 {
    if a.is_nan() || !(b.is_nan() || b > a) { a } else { b }
}

/// Runs a well-formed program needing at most `N` stack slots (which `parse` guarantees), so the
/// indexing below stays in bounds.
fn run<const N: usize>(code: &[Op], values: &[f64]) -> f64 {
    let var = |i: usize| values.get(i).copied().unwrap_or(f64::NAN);
    // The top of the stack lives in a register and the rest in `stack[..n]`; the first push
    // spills the initial placeholder.
    let mut stack = [0.0_f64; N];
    let (mut n, mut top) = (0, f64::NAN);
    for &op in code {
        top = match op {
            Op::Const(c) => push(&mut stack, &mut n, top, c),
            Op::Var(i) => push(&mut stack, &mut n, top, var(i)),
            Op::Neg => -top,
            Op::Abs => top.abs(),
            Op::Sqrt => top.sqrt(),
            Op::Exp => top.exp(),
            Op::Ln => top.ln(),
            // Squares are the common case (quadratic plant maps); `x * x` is what `powi(2)`
            // computes, without the call into the runtime's generic power loop.
            Op::PowI(2) => top * top,
            Op::PowI(k) => top.powi(k),
            Op::AddC(c) => top + c,
            Op::SubC(c) => top - c,
            Op::RSubC(c) => c - top,
            Op::MulC(c) => top * c,
            Op::DivC(c) => top / c,
            Op::RDivC(c) => c / top,
            Op::AddV(i) => top + var(i),
            Op::SubV(i) => top - var(i),
            Op::RSubV(i) => var(i) - top,
            Op::MulV(i) => top * var(i),
            Op::DivV(i) => top / var(i),
            Op::RDivV(i) => var(i) / top,
            Op::Add => pop(&stack, &mut n) + top,
            Op::Sub => pop(&stack, &mut n) - top,
            Op::Mul => pop(&stack, &mut n) * top,
            Op::Div => pop(&stack, &mut n) / top,
            Op::Pow => pop(&stack, &mut n).powf(top),
            Op::Min => min(pop(&stack, &mut n), top),
            Op::Max => max(pop(&stack, &mut n), top),
        };
    }
    top
}

#[inline(always)]
fn push<const N: usize>(stack: &mut [f64; N], n: &mut usize, top: f64, value: f64) -> f64 {
    stack[*n] = top;
    *n += 1;
    value
}

#[inline(always)]
fn pop<const N: usize>(stack: &[f64; N], n: &mut usize) -> f64 {
    *n -= 1;
    stack[*n]
}

fn err<T>(column: usize, message: impl Into<String>) -> Result<T, ExprError> {
    Err(ExprError { column, message: message.into() })
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Kind {
    Num(f64),
    Name,
    Plus,
    Minus,
    Star,
    Slash,
    Caret,
    LParen,
    RParen,
    Comma,
    End,
}

#[derive(Debug, Clone, Copy)]
struct Token<'a> {
    kind: Kind,
    col: usize,
    text: &'a str,
}

impl Token<'_> {
    fn describe(&self) -> String {
        match self.kind {
            Kind::End => "the end of the expression".to_string(),
            _ => format!("'{}'", self.text),
        }
    }
}

/// Length of the number at the start of `b`, or the length of the malformed prefix and why.
fn scan_number(b: &[u8]) -> Result<usize, (usize, &'static str)> {
    let digits = |from: usize| b.iter().skip(from).take_while(|c| c.is_ascii_digit()).count();
    let mut n = digits(0);
    if b.get(n) == Some(&b'.') {
        let frac = digits(n + 1);
        if frac == 0 {
            return Err((n + 1, "expected a digit after '.'"));
        }
        n += 1 + frac;
    }
    if matches!(b.get(n), Some(b'e' | b'E')) {
        let sign = usize::from(matches!(b.get(n + 1), Some(b'+' | b'-')));
        let exp = digits(n + 1 + sign);
        if exp == 0 {
            return Err((n + 1 + sign, "expected digits in the exponent"));
        }
        n += 1 + sign + exp;
    }
    Ok(n)
}

struct Parser<'a> {
    src: &'a str,
    /// Byte offset and column of the first character not yet lexed.
    pos: usize,
    col: usize,
    /// One token of lookahead; lexing lazily keeps errors in source order.
    tok: Token<'a>,
    depth: usize,
    /// Stack height after the code emitted so far, and its maximum, both counted before fusing
    /// and folding, which only lower them.
    stack: usize,
    max_stack: usize,
    code: Vec<Op>,
    names: Vec<String>,
    name_columns: Vec<usize>,
    index: HashMap<&'a str, usize>,
}

impl<'a> Parser<'a> {
    fn advance(&mut self) -> Result<(), ExprError> {
        let untrimmed = self.src.get(self.pos..).unwrap_or("");
        let rest = untrimmed.trim_start_matches([' ', '\t', '\n', '\r']);
        // Whitespace and all token characters are ASCII: one byte is one column.
        let skipped = untrimmed.len() - rest.len();
        self.pos += skipped;
        self.col += skipped;
        let col = self.col;
        let bytes = rest.as_bytes();
        let (kind, len) = match bytes.first() {
            None => (Kind::End, 0),
            Some(b'0'..=b'9' | b'.') => {
                let len = scan_number(bytes)
                    .or_else(|(len, why)| err(col, format!("malformed number '{}': {why}", &rest[..len])))?;
                let text = &rest[..len];
                match text.parse::<f64>() {
                    Ok(v) if v.is_finite() => (Kind::Num(v), len),
                    Ok(_) => return err(col, format!("number '{text}' is too large")),
                    Err(e) => return err(col, format!("malformed number '{text}': {e}")),
                }
            }
            Some(b'A'..=b'Z' | b'a'..=b'z' | b'_') => {
                let name = |c: &&u8| c.is_ascii_alphanumeric() || **c == b'_';
                (Kind::Name, bytes.iter().take_while(name).count())
            }
            Some(b'+') => (Kind::Plus, 1),
            Some(b'-') => (Kind::Minus, 1),
            Some(b'*') => (Kind::Star, 1),
            Some(b'/') => (Kind::Slash, 1),
            Some(b'^') => (Kind::Caret, 1),
            Some(b'(') => (Kind::LParen, 1),
            Some(b')') => (Kind::RParen, 1),
            Some(b',') => (Kind::Comma, 1),
            Some(_) => {
                let c = rest.chars().next().unwrap_or('?');
                return err(col, format!("unexpected character {c:?}"));
            }
        };
        self.tok = Token { kind, col, text: &rest[..len] };
        self.pos += len;
        self.col += len;
        Ok(())
    }

    fn enter(&mut self, col: usize) -> Result<(), ExprError> {
        self.depth += 1;
        if self.depth > MAX_DEPTH {
            let what = "levels of parentheses, signs, powers or calls";
            return err(col, format!("nested too deeply (more than {MAX_DEPTH} {what})"));
        }
        Ok(())
    }

    fn push(&mut self, op: Op, col: usize) -> Result<(), ExprError> {
        self.stack += 1;
        if self.stack > MAX_STACK {
            let why = format!("evaluating it would hold more than {MAX_STACK} intermediate values");
            return err(col, format!("expression too complex: {why}"));
        }
        self.max_stack = self.max_stack.max(self.stack);
        self.code.push(op);
        Ok(())
    }

    /// Emits binary `op` whose right operand's code starts at `right`, fusing a constant or
    /// variable operand into it. A leaf op is a whole subexpression, so a leaf at the end of
    /// either operand's code is that entire operand.
    fn binary(&mut self, op: Op, right: usize) {
        self.stack -= 1;
        let last = self.code.last().copied();
        let before_right = right.checked_sub(1).and_then(|i| self.code.get(i)).copied();
        if let Some(fused) = last.and_then(|leaf| op.fuse(leaf, false)) {
            self.code.pop();
            self.emit(fused);
        } else if let Some(fused) = before_right.and_then(|leaf| op.fuse(leaf, true)) {
            self.code.remove(right - 1);
            self.emit(fused);
        } else {
            self.emit(op);
        }
    }

    /// Appends `op`, folding it into a constant when all its operands are constants. Folding
    /// runs `op` through `run` like evaluation would, so it cannot change results.
    fn emit(&mut self, op: Op) {
        let start = self.code.len() - op.arity();
        self.code.push(op);
        let operands = &self.code[start..self.code.len() - 1];
        if !op.reads_var() && operands.iter().all(|o| matches!(o, Op::Const(_))) {
            let value = run::<2>(&self.code[start..], &[]);
            self.code.truncate(start);
            self.code.push(Op::Const(value));
        }
    }

    fn expr(&mut self) -> Result<(), ExprError> {
        self.term()?;
        loop {
            let op = match self.tok.kind {
                Kind::Plus => Op::Add,
                Kind::Minus => Op::Sub,
                _ => return Ok(()),
            };
            self.advance()?;
            let right = self.code.len();
            self.term()?;
            self.binary(op, right);
        }
    }

    fn term(&mut self) -> Result<(), ExprError> {
        self.unary()?;
        loop {
            let op = match self.tok.kind {
                Kind::Star => Op::Mul,
                Kind::Slash => Op::Div,
                _ => return Ok(()),
            };
            self.advance()?;
            let right = self.code.len();
            self.unary()?;
            self.binary(op, right);
        }
    }

    /// Signs bind looser than `^`, so `-x^2` is `-(x^2)`.
    fn unary(&mut self) -> Result<(), ExprError> {
        let negate = match self.tok.kind {
            Kind::Minus => true,
            Kind::Plus => false,
            _ => return self.power(),
        };
        self.enter(self.tok.col)?;
        self.advance()?;
        self.unary()?;
        if negate {
            self.emit(Op::Neg);
        }
        self.depth -= 1;
        Ok(())
    }

    /// The exponent is parsed by `unary`, which makes `^` right-associative and allows `2^-1`.
    fn power(&mut self) -> Result<(), ExprError> {
        self.primary()?;
        if self.tok.kind == Kind::Caret {
            self.enter(self.tok.col)?;
            self.advance()?;
            let right = self.code.len();
            self.unary()?;
            self.binary(Op::Pow, right);
            self.depth -= 1;
        }
        Ok(())
    }

    fn primary(&mut self) -> Result<(), ExprError> {
        let Token { kind, col, text } = self.tok;
        match kind {
            Kind::Num(v) => {
                self.advance()?;
                self.push(Op::Const(v), col)
            }
            Kind::Name => {
                self.advance()?;
                if self.tok.kind == Kind::LParen {
                    return self.call(text, col);
                }
                if matches!(text, "min" | "max" | "abs" | "sqrt" | "exp" | "ln") {
                    let message = format!("'{text}' is a function, not a variable");
                    return err(col, format!("{message}; call it as {text}(...)"));
                }
                let i = match self.index.get(text) {
                    Some(&i) => i,
                    None => {
                        self.index.insert(text, self.names.len());
                        self.names.push(text.to_string());
                        self.name_columns.push(col);
                        self.names.len() - 1
                    }
                };
                self.push(Op::Var(i), col)
            }
            Kind::LParen => {
                self.enter(col)?;
                self.advance()?;
                self.expr()?;
                let at = self.tok.col;
                match self.tok.kind {
                    Kind::RParen => self.advance()?,
                    Kind::End => {
                        return err(at, format!("missing ')' for the '(' at column {col}"));
                    }
                    _ => {
                        let expected = format!("expected ')' to close the '(' at column {col}");
                        return err(at, format!("{expected} but found {}", self.tok.describe()));
                    }
                }
                self.depth -= 1;
                Ok(())
            }
            _ => {
                let found = self.tok.describe();
                err(col, format!("expected a number, a name or '(' but found {found}"))
            }
        }
    }

    /// Parses `name(args)` with the lookahead on `(`; min/max chain into binary ops as they go.
    fn call(&mut self, name: &str, col: usize) -> Result<(), ExprError> {
        let (op, variadic) = match name {
            "min" => (Op::Min, true),
            "max" => (Op::Max, true),
            "abs" => (Op::Abs, false),
            "sqrt" => (Op::Sqrt, false),
            "exp" => (Op::Exp, false),
            "ln" => (Op::Ln, false),
            _ => {
                let known = format!("(known functions: {FUNCTIONS})");
                return err(col, format!("unknown function '{name}' {known}"));
            }
        };
        let (min_args, rule) = match variadic {
            true => (2, "needs at least 2 arguments"),
            false => (1, "takes exactly 1 argument"),
        };
        let arity_error = || err(col, format!("{name}() {rule}"));
        let open = self.tok.col;
        self.enter(open)?;
        self.advance()?;
        let mut count = 0;
        if self.tok.kind != Kind::RParen {
            loop {
                let right = self.code.len();
                self.expr()?;
                count += 1;
                if variadic && count > 1 {
                    self.binary(op, right);
                }
                if self.tok.kind != Kind::Comma {
                    break;
                }
                if !variadic {
                    return arity_error();
                }
                self.advance()?;
            }
        }
        let at = self.tok.col;
        match self.tok.kind {
            Kind::RParen if count < min_args => arity_error(),
            Kind::RParen => {
                if !variadic {
                    self.emit(op);
                }
                self.advance()?;
                self.depth -= 1;
                Ok(())
            }
            Kind::End => err(at, format!("missing ')' for the '(' at column {open}")),
            _ => {
                let expected = format!("expected ',' or ')' in the call to {name}()");
                err(at, format!("{expected} but found {}", self.tok.describe()))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn eval(source: &str, values: &[f64]) -> f64 {
        match Expr::parse(source) {
            Ok(e) => e.eval(values),
            Err(e) => panic!("{source:?} failed to parse: {e}"),
        }
    }

    fn error(source: &str) -> ExprError {
        match Expr::parse(source) {
            Ok(e) => panic!("{source:?} parsed unexpectedly: {e:?}"),
            Err(e) => e,
        }
    }

    fn fails(source: &str, column: usize, message: &str) {
        let expected = ExprError { column, message: message.to_string() };
        assert_eq!(error(source), expected, "{source:?}");
    }

    fn bits(x: f64) -> u64 {
        x.to_bits()
    }

    #[test]
    fn minus_binds_looser_than_power() {
        assert_eq!(eval("-x^2", &[3.0]), -9.0);
        assert_eq!(eval("-2^2", &[]), -4.0);
        assert_eq!(eval("(-2)^2", &[]), 4.0);
    }

    #[test]
    fn power_is_right_associative_and_accepts_a_negated_exponent() {
        assert_eq!(eval("2^3^2", &[]), 512.0);
        assert_eq!(eval("2^-1", &[]), 0.5);
        assert_eq!(eval("2^-x^2", &[1.0]), 0.5);
        assert_eq!(eval("x^y^z", &[2.0, 3.0, 2.0]), 512.0);
    }

    #[test]
    fn products_bind_tighter_than_sums_and_both_are_left_associative() {
        assert_eq!(eval("1 + 2 * 3", &[]), 7.0);
        assert_eq!(eval("(1 + 2) * 3", &[]), 9.0);
        assert_eq!(eval("10 - 4 - 3", &[]), 3.0);
        assert_eq!(eval("64 / 4 / 2", &[]), 8.0);
        assert_eq!(eval("x - y - z", &[10.0, 4.0, 3.0]), 3.0);
        assert_eq!(eval("x / y * z", &[8.0, 4.0, 3.0]), 6.0);
        assert_eq!(eval("2 * 3 ^ 2", &[]), 18.0);
    }

    #[test]
    fn constants_and_variables_work_on_either_side_of_an_operator() {
        let cases = [
            ("2 - x", -1.0),
            ("x - 2", 1.0),
            ("y - x", 9.0),
            ("6 / x", 2.0),
            ("x / 6", 0.5),
            ("y / x", 4.0),
            ("(x + y) - (y * 2)", -9.0),
            ("y - (x + 1)", 8.0),
            ("2 * (y / x) - 1", 7.0),
            ("1 / (x - 2) / (y - 10)", 0.5),
        ];
        for (source, value) in cases {
            let e = Expr::parse(source).unwrap();
            let bound: Vec<f64> = e.names().iter().map(|n| if n == "x" { 3.0 } else { 12.0 }).collect();
            assert_eq!(e.eval(&bound), value, "{source}");
        }
    }

    #[test]
    fn signs_can_be_stacked_and_follow_binary_operators() {
        assert_eq!(eval("--x", &[5.0]), 5.0);
        assert_eq!(eval("+-+x", &[5.0]), -5.0);
        assert_eq!(eval("2 * -x", &[3.0]), -6.0);
        assert_eq!(eval("2 - -x", &[3.0]), 5.0);
        assert_eq!(bits(eval("-(x)", &[0.0])), bits(-0.0));
    }

    #[test]
    fn the_config_examples_evaluate_as_written() {
        let e = Expr::parse("0.91 - 1.8 * (excess_air - best_air)^2").unwrap();
        assert_eq!(e.names(), ["excess_air", "best_air"]);
        assert_eq!(e.eval(&[3.5, 3.0]), 0.91 - 1.8 * 0.25);
        assert_eq!(eval("steam_flow / fuel_flow", &[30.0, 4.0]), 7.5);
    }

    #[test]
    fn functions_compute_what_their_names_say() {
        assert_eq!(eval("min(3, 1, 2)", &[]), 1.0);
        assert_eq!(eval("max(x, 7, y)", &[3.0, 9.0]), 9.0);
        assert_eq!(eval("min(x, y)", &[4.0, -2.0]), -2.0);
        assert_eq!(eval("abs(-2.5)", &[]), 2.5);
        assert_eq!(eval("sqrt(x)", &[16.0]), 4.0);
        assert_eq!(eval("exp(0)", &[]), 1.0);
        assert_eq!(eval("ln(exp(x))", &[2.0]), 2.0);
        assert_eq!(eval("max(abs(x), sqrt(9))", &[-5.0]), 5.0);
        assert_eq!(eval("min(5, 4, 3, 2, 1, 0, -1, -2)", &[]), -2.0);
    }

    #[test]
    fn min_and_max_pass_nan_on_and_keep_the_first_of_equal_zeros() {
        // A failed measurement inside min/max must still reach the watchdog as NaN.
        assert!(eval("min(x, 1)", &[f64::NAN]).is_nan());
        assert!(eval("max(1, x)", &[f64::NAN]).is_nan());
        assert!(eval("max(1, x, 2)", &[f64::NAN]).is_nan());
        assert_eq!(bits(eval("min(-0.0, 0)", &[])), bits(-0.0));
        assert_eq!(bits(eval("min(0, x)", &[-0.0])), bits(0.0));
        assert_eq!(bits(eval("max(x, 0)", &[-0.0])), bits(-0.0));
    }

    #[test]
    fn evaluation_follows_ieee_rules_instead_of_failing() {
        assert_eq!(eval("1 / x", &[0.0]), f64::INFINITY);
        assert!(eval("x / x", &[0.0]).is_nan());
        assert!(eval("ln(-1)", &[]).is_nan());
        assert!(eval("sqrt(x)", &[-1.0]).is_nan());
        assert_eq!(eval("exp(1000)", &[]), f64::INFINITY);
    }

    #[test]
    fn numbers_are_accepted_in_all_documented_formats() {
        let cases = [("1", 1.0), ("1.5", 1.5), (".5", 0.5), ("1e3", 1e3), ("1.5E-3", 1.5e-3)];
        for (text, value) in cases.into_iter().chain([("2.5e+2", 250.0), ("007", 7.0)]) {
            assert_eq!(eval(text, &[]), value, "{text}");
        }
        assert_eq!(eval("1e-400", &[]), 0.0);
    }

    #[test]
    fn malformed_or_huge_numbers_are_refused() {
        fails("x + 2.", 5, "malformed number '2.': expected a digit after '.'");
        fails("2.e3", 1, "malformed number '2.': expected a digit after '.'");
        fails(". 5", 1, "malformed number '.': expected a digit after '.'");
        fails("1e", 1, "malformed number '1e': expected digits in the exponent");
        fails("3 * 1.5e-x", 5, "malformed number '1.5e-': expected digits in the exponent");
        fails("1e999", 1, "number '1e999' is too large");
        fails("1.2.3", 4, "unexpected '.3' after the end of the expression");
    }

    #[test]
    fn integer_constant_exponents_use_powi_and_others_use_powf() {
        // 1.01^3 rounds differently through powi (two multiplications) and powf.
        let x = std::hint::black_box(1.01_f64);
        assert_ne!(bits(x.powi(3)), bits(x.powf(3.0)));
        assert_eq!(bits(eval("x^3", &[x])), bits(x.powi(3)));
        assert_eq!(bits(eval("x^(1 + 2)", &[x])), bits(x.powi(3)));
        assert_eq!(bits(eval("x^y", &[x, 3.0])), bits(x.powf(3.0)));
        assert_eq!(bits(eval("x^-3", &[x])), bits(x.powi(-3)));
        assert_eq!(bits(eval("x^65", &[x])), bits(x.powf(65.0)));
        assert_eq!(eval("x^0.5", &[4.0]), 2.0);
    }

    #[test]
    fn names_are_listed_once_in_order_of_first_appearance() {
        let e = Expr::parse("b*a + b + _c2 - a").unwrap();
        assert_eq!(e.names(), ["b", "a", "_c2"]);
        let columns: Vec<usize> = (0..4).map(|i| e.name_column(i)).collect();
        assert_eq!(columns, [1, 3, 11, 0]);
        assert_eq!(e.eval(&[2.0, 3.0, 5.0]), 2.0 * 3.0 + 2.0 + 5.0 - 3.0);
        assert!(Expr::parse("1 + 2").unwrap().names().is_empty());
    }

    #[test]
    fn missing_values_read_as_nan_and_extra_values_are_ignored() {
        let e = Expr::parse("x + y").unwrap();
        assert!(e.eval(&[1.0]).is_nan());
        assert!(e.eval(&[]).is_nan());
        assert_eq!(e.eval(&[1.0, 2.0, 100.0]), 3.0);
    }

    #[test]
    fn display_and_source_give_back_the_original_text() {
        let text = "  min(a,\n\tb) ^ 2 ";
        let e = Expr::parse(text).unwrap();
        assert_eq!(e.source(), text);
        assert_eq!(e.to_string(), text);
    }

    #[test]
    fn errors_name_the_problem_and_its_column() {
        let number_name_or_paren = "expected a number, a name or '(' but found";
        fails("1 + * 2", 5, &format!("{number_name_or_paren} '*'"));
        fails("x +\n\t*", 6, &format!("{number_name_or_paren} '*'"));
        fails("1 +", 4, &format!("{number_name_or_paren} the end of the expression"));
        fails("()", 2, &format!("{number_name_or_paren} ')'"));
        fails("min(1, )", 8, &format!("{number_name_or_paren} ')'"));
        fails("(x + 1))", 8, "unbalanced ')' with no '(' to close");
        fails("min(x, 1", 9, "missing ')' for the '(' at column 4");
        fails("2 * (x + 1", 11, "missing ')' for the '(' at column 5");
        fails("(1 2)", 4, "expected ')' to close the '(' at column 1 but found '2'");
        fails("max(1 2)", 7, "expected ',' or ')' in the call to max() but found '2'");
        fails("x $ y", 3, "unexpected character '$'");
        fails("1 + é", 5, "unexpected character 'é'");
        fails("", 1, "empty expression");
        fails(" \t\n", 1, "empty expression");
        fails("1 x", 3, "unexpected 'x' after the end of the expression");
    }

    #[test]
    fn error_display_puts_the_column_after_the_message() {
        let message = error("(x + 1))").to_string();
        assert_eq!(message, "unbalanced ')' with no '(' to close at column 8");
    }

    #[test]
    fn function_names_are_reserved() {
        fails("exp + 1", 1, "'exp' is a function, not a variable; call it as exp(...)");
        for name in ["min", "max", "abs", "sqrt", "ln"] {
            let e = error(&format!("2 * {name}"));
            assert_eq!(e.column, 5);
            assert!(e.message.starts_with(&format!("'{name}' is a function")), "{e}");
        }
        assert_eq!(eval("exp_ + lnx", &[1.0, 2.0]), 3.0);
    }

    #[test]
    fn calling_an_unknown_function_is_an_error() {
        let known = "(known functions: min, max, abs, sqrt, exp, ln)";
        fails("1 + foo(2)", 5, &format!("unknown function 'foo' {known}"));
        fails("Min(1, 2)", 1, &format!("unknown function 'Min' {known}"));
    }

    #[test]
    fn functions_check_their_argument_count() {
        fails("min(x)", 1, "min() needs at least 2 arguments");
        fails("1 + max()", 5, "max() needs at least 2 arguments");
        fails("abs(1, 2)", 1, "abs() takes exactly 1 argument");
        fails("x * sqrt()", 5, "sqrt() takes exactly 1 argument");
        fails("ln(x, y, z)", 1, "ln() takes exactly 1 argument");
    }

    #[test]
    fn nesting_up_to_64_levels_is_accepted() {
        let parens = format!("{}x{}", "(".repeat(64), ")".repeat(64));
        assert_eq!(eval(&parens, &[2.0]), 2.0);
        assert_eq!(eval(&format!("{}x", "-".repeat(64)), &[2.0]), 2.0);
        assert_eq!(eval(&format!("{}x{}", "abs(".repeat(64), ")".repeat(64)), &[-2.0]), 2.0);
        // 63 powers hold 64 values on the stack, the most it has.
        assert_eq!(eval(&format!("{}1", "1^".repeat(63)), &[]), 1.0);
    }

    #[test]
    fn deep_nesting_is_an_error_rather_than_a_crash() {
        let n = 100_000;
        let too_deep = [
            format!("{}x{}", "(".repeat(n), ")".repeat(n)),
            "(".repeat(n),
            format!("{}x", "-".repeat(n)),
            format!("{}x", "-(".repeat(n)),
            format!("{}2", "2^".repeat(n)),
            format!("{}x{}", "abs(".repeat(n), ")".repeat(n)),
            format!("{}x{}", "min(1, ".repeat(n), ")".repeat(n)),
        ];
        for source in &too_deep {
            let e = error(source);
            let refused = ["nested too deeply", "expression too complex"];
            assert!(refused.iter().any(|r| e.message.starts_with(r)), "{e}");
        }
        let deep = "nested too deeply (more than 64 levels of parentheses, signs, powers or calls)";
        fails(&format!("{}x{}", "(".repeat(65), ")".repeat(65)), 65, deep);
        fails(&format!("{}x", "-".repeat(65)), 65, deep);
        fails(&format!("{}x{}", "abs(".repeat(65), ")".repeat(65)), 4 * 64 + 4, deep);
        // Exponents need a stack slot per level, so a long chain runs out of stack first.
        assert_eq!(error(&format!("{}1", "1^".repeat(64))).column, 129);
    }

    #[test]
    fn expressions_needing_more_than_64_stack_slots_are_refused() {
        // `x+(x+(...(x+x)...))` with k parentheses holds k+2 values at its deepest point.
        let nested = |k: usize| format!("{}x+x{}", "x+(".repeat(k), ")".repeat(k));
        for k in [0, 14, 15, 62] {
            assert_eq!(eval(&nested(k), &[1.0]), k as f64 + 2.0, "{k}");
        }
        let too_complex = "expression too complex: evaluating it would hold more than 64 \
                           intermediate values";
        fails(&nested(63), 3 * 63 + 3, too_complex);
    }

    #[test]
    fn long_flat_expressions_are_fine() {
        assert_eq!(eval(&format!("{}x", "x + ".repeat(100_000)), &[1.0]), 100_001.0);
        assert_eq!(eval(&format!("{}1", "1 + ".repeat(100_000)), &[]), 100_001.0);
    }

    /// Reference semantics for the property tests, written independently of `run`.
    #[derive(Debug, Clone)]
    enum Tree {
        Const(f64),
        Var(usize),
        Neg(Box<Tree>),
        Bin(char, Box<Tree>, Box<Tree>),
        Call(&'static str, Vec<Tree>),
    }

    const VARS: [&str; 3] = ["x", "y", "flow_2"];

    impl Tree {
        fn render(&self) -> String {
            match self {
                Tree::Const(c) if c.is_sign_negative() => format!("({c:?})"),
                Tree::Const(c) => format!("{c:?}"),
                Tree::Var(i) => VARS[*i].to_string(),
                Tree::Neg(a) => format!("(-{})", a.render()),
                Tree::Bin(op, a, b) => format!("({} {op} {})", a.render(), b.render()),
                Tree::Call(f, args) => {
                    let args: Vec<String> = args.iter().map(Tree::render).collect();
                    format!("{f}({})", args.join(", "))
                }
            }
        }

        fn has_vars(&self) -> bool {
            match self {
                Tree::Const(_) => false,
                Tree::Var(_) => true,
                Tree::Neg(a) => a.has_vars(),
                Tree::Bin(_, a, b) => a.has_vars() || b.has_vars(),
                Tree::Call(_, args) => args.iter().any(Tree::has_vars),
            }
        }

        fn vars_in_order(&self, out: &mut Vec<usize>) {
            match self {
                Tree::Const(_) => {}
                Tree::Var(i) if !out.contains(i) => out.push(*i),
                Tree::Var(_) => {}
                Tree::Neg(a) => a.vars_in_order(out),
                Tree::Bin(_, a, b) => {
                    a.vars_in_order(out);
                    b.vars_in_order(out);
                }
                Tree::Call(_, args) => args.iter().for_each(|a| a.vars_in_order(out)),
            }
        }

        fn eval(&self, v: &[f64]) -> f64 {
            // A NaN argument makes the result NaN; ties keep the earlier argument.
            let pick_min = |a: f64, b: f64| {
                if a.is_nan() {
                    a
                } else if b.is_nan() || b < a {
                    b
                } else {
                    a
                }
            };
            let pick_max = |a: f64, b: f64| {
                if a.is_nan() {
                    a
                } else if b.is_nan() || b > a {
                    b
                } else {
                    a
                }
            };
            match self {
                Tree::Const(c) => *c,
                Tree::Var(i) => v[*i],
                Tree::Neg(a) => -a.eval(v),
                Tree::Bin(op, a, b) => {
                    let (x, y) = (a.eval(v), b.eval(v));
                    match op {
                        '+' => x + y,
                        '-' => x - y,
                        '*' => x * y,
                        '/' => x / y,
                        // Constant integer exponents go through powi, as documented on `parse`.
                        _ if !b.has_vars() && y == y.trunc() && y.abs() <= 64.0 => x.powi(y as i32),
                        _ => x.powf(y),
                    }
                }
                Tree::Call(f, args) => {
                    let mut vals = args.iter().map(|a| a.eval(v));
                    let first = vals.next().unwrap();
                    match *f {
                        "min" => vals.fold(first, pick_min),
                        "max" => vals.fold(first, pick_max),
                        "abs" => first.abs(),
                        "sqrt" => first.sqrt(),
                        "exp" => first.exp(),
                        _ => first.ln(),
                    }
                }
            }
        }
    }

    fn constant() -> impl Strategy<Value = f64> {
        prop_oneof![
            (-4i32..=4).prop_map(f64::from),
            (60i32..=70).prop_map(f64::from),
            Just(0.5),
            Just(-0.0),
            any::<f64>().prop_filter("finite", |c| c.is_finite()),
            (-1e3..1e3f64),
        ]
    }

    fn tree() -> impl Strategy<Value = Tree> {
        let leaf = prop_oneof![constant().prop_map(Tree::Const), (0..VARS.len()).prop_map(Tree::Var)];
        leaf.prop_recursive(6, 48, 4, |inner| {
            prop_oneof![
                inner.clone().prop_map(|a| Tree::Neg(Box::new(a))),
                (prop::sample::select(vec!['+', '-', '*', '/', '^']), inner.clone(), inner.clone())
                    .prop_map(|(op, a, b)| Tree::Bin(op, Box::new(a), Box::new(b))),
                (prop::sample::select(vec!["min", "max"]), prop::collection::vec(inner.clone(), 2..5))
                    .prop_map(|(f, args)| Tree::Call(f, args)),
                (prop::sample::select(vec!["abs", "sqrt", "exp", "ln"]), inner)
                    .prop_map(|(f, a)| Tree::Call(f, vec![a])),
            ]
        })
    }

    fn value() -> impl Strategy<Value = f64> {
        prop_oneof![(-3.0..3.0f64), any::<f64>(), (-3i32..=3).prop_map(f64::from)]
    }

    fn values(len: impl Into<prop::collection::SizeRange>) -> impl Strategy<Value = Vec<f64>> {
        prop::collection::vec(value(), len)
    }

    const TOKENS: [&str; 20] = [
        "min(", "max(", "abs(", "ln(", "exp", "x", "y1", "2", ".5", "1e", "1e-3", "(", ")", ",", "-", "+",
        "*", "/", "^", " ",
    ];

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]

        #[test]
        fn parsed_trees_evaluate_like_the_tree_itself(t in tree(), values in values(3)) {
            let source = t.render();
            let e = Expr::parse(&source)
                .map_err(|e| TestCaseError::fail(format!("{source}: {e}")))?;
            let mut order = Vec::new();
            t.vars_in_order(&mut order);
            let expected_names: Vec<&str> = order.iter().map(|&i| VARS[i]).collect();
            prop_assert_eq!(e.names(), expected_names.as_slice());
            let bound: Vec<f64> = order.iter().map(|&i| values[i]).collect();
            let (got, want) = (e.eval(&bound), t.eval(&values));
            prop_assert!(
                got.to_bits() == want.to_bits() || (got.is_nan() && want.is_nan()),
                "{} gave {:?}, expected {:?}", source, got, want
            );
        }

        #[test]
        fn operator_soup_parses_or_is_refused_at_its_cause(
            source in "[()+\\-*/^.,eE0-9a-z \t]{0,60}",
            values in values(0..4),
        ) {
            check_any_input(&source, &values)?;
        }

        #[test]
        fn arbitrary_text_parses_or_is_refused_at_its_cause(source in any::<String>(), values in values(0..4)) {
            check_any_input(&source, &values)?;
        }

        #[test]
        fn token_sequences_parse_or_are_refused_at_their_cause(
            tokens in prop::collection::vec(prop::sample::select(TOKENS.to_vec()), 0..40),
            values in values(0..4),
        ) {
            check_any_input(&tokens.concat(), &values)?;
        }
    }

    fn check_any_input(source: &str, values: &[f64]) -> Result<(), TestCaseError> {
        match Expr::parse(source) {
            Ok(e) => {
                let _ = e.eval(values);
                prop_assert_eq!(e.source(), source);
                for (i, name) in e.names().iter().enumerate() {
                    let column = e.name_column(i);
                    let at: String = source.chars().skip(column - 1).take(name.len()).collect();
                    prop_assert_eq!(&at, name);
                }
            }
            Err(e) => {
                let columns = 1..=source.chars().count() + 1;
                prop_assert!(columns.contains(&e.column), "{:?}: {:?}", source, e);
                prop_assert!(!e.message.is_empty());
                prop_assert!(e.to_string().ends_with(&format!(" at column {}", e.column)), "{:?}", e);
                points_at_its_cause(source, &e)?;
            }
        }
        Ok(())
    }

    /// An error's column is where the problem is: on what the message quotes as found,
    /// on the name, bracket or sign it is about, or at the end for what is missing; never
    /// on whitespace the lexer skips, unless the whole expression is blank.
    fn points_at_its_cause(source: &str, e: &ExprError) -> Result<(), TestCaseError> {
        let chars: Vec<char> = source.chars().collect();
        let at: String = chars[e.column - 1..].iter().collect();
        let end = e.column == chars.len() + 1;
        let char_at = |column: usize| chars.get(column - 1).copied();
        let m = e.message.as_str();
        // The text between the first pair of single quotes, and the column named after "at column".
        let quoted = m.split('\'').nth(1).unwrap_or("");
        let named_column =
            |m: &str| -> Option<usize> { m.split("at column ").nth(1)?.split(' ').next()?.parse().ok() };
        let fail = |why: &str| Err(TestCaseError::fail(format!("{source:?}: {e:?}: {why}")));
        if m == "empty expression" {
            prop_assert!(source.trim_start_matches([' ', '\t', '\n', '\r']).is_empty(), "{:?}", e);
            return Ok(());
        }
        if !end && matches!(char_at(e.column), Some(' ' | '\t' | '\n' | '\r')) {
            return fail("the column is on skipped whitespace");
        }
        if let Some(open) = named_column(m) {
            // "missing ')' for the '(' at column N", "expected ')' to close the '(' at column N ...".
            if char_at(open) != Some('(') {
                return fail("the column the message names is not a '('");
            }
        }
        let fits = if m.starts_with("unexpected character ") {
            char_at(e.column).is_some_and(|c| m == format!("unexpected character {c:?}"))
        } else if m.starts_with("missing ')'") || m.ends_with("found the end of the expression") {
            end
        } else if m.contains("found '") {
            at.starts_with(m.split("found '").nth(1).and_then(|f| f.rsplit_once('\'')).map_or("", |f| f.0))
        } else if m.starts_with("malformed number")
            || m.starts_with("number ")
            || m.starts_with("unknown function")
            || m.contains("is a function, not a variable")
            || m.starts_with("unexpected '")
            || m.starts_with("unbalanced ')'")
        {
            at.starts_with(quoted)
        } else if let Some((name, _)) = m.split_once("() ") {
            // "min() needs at least 2 arguments": the column is on the function's name.
            at.starts_with(name)
        } else if m.starts_with("nested too deeply") {
            matches!(char_at(e.column), Some('(' | '-' | '+' | '^'))
        } else if m.starts_with("expression too complex") {
            char_at(e.column).is_some_and(|c| c.is_ascii_alphanumeric() || c == '_' || c == '.')
        } else {
            return fail("a message this property does not know: teach it where the column should be");
        };
        if !fits {
            return fail("the column is not on what the message is about");
        }
        Ok(())
    }
}
