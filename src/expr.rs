//! The formula language of scenario files: a parser to a constant-folded stack program, and its fast evaluator.
//!
//! A formula such as `30 + 12*sin(pi*moisture) - 0.8*(sun-6)^2` is parsed once by a
//! recursive-descent parser that emits stack-machine code directly (no tree is kept), folds
//! every sub-expression whose operands are all constants, and is then evaluated many times
//! with [`Formula::eval`] (one point, no allocation for ordinary formulas) or
//! [`Formula::eval_rows`] (many points, each instruction run over a block of rows).
//!
//! Language:
//! - numbers `2`, `0.5`, `.5`, `5.`, `1e-3`, `2.5E+2`;
//! - variables: identifiers `[A-Za-z_][A-Za-z0-9_]*`, resolved against the names given to
//!   [`Formula::parse`]; the constants `pi` and `e` (a variable of the same name shadows them);
//! - binary `+ - * / ^` with the usual precedence; `^` is right-associative and binds tighter
//!   than unary minus (`-x^2 = -(x^2)`), and its exponent may carry a sign (`2^-1 = 0.5`);
//! - comparisons `< <= > >= == !=` with the lowest precedence, giving 1.0 or 0.0; they do not
//!   chain (`0 < x < 1` is an error: write `(0 < x) * (x < 1)`);
//! - functions `sin cos tan exp ln log10 sqrt abs tanh atan logistic` (one argument),
//!   `min max` (two or more), `atan2(y, x)` and `if(cond, a, b)`.
//!
//! NaN handling differs from `f64` in three deliberate places so that a NaN is never silently
//! hidden: `min`/`max` return NaN if any argument is NaN, a comparison returns NaN when either
//! side is NaN (not 0), and `if` returns NaN when its condition is NaN. Both branches of `if` are evaluated (they have no side effects).

use ndarray::{s, ArrayView2};

/// Deepest nesting of parentheses, calls, unary signs and powers the parser accepts.
const MAX_NESTING: usize = 100;

/// Longest formula the parser accepts, in bytes: far beyond any test function written by hand
/// (Friedman's are under 100), while a formula of millions of terms made `validate` evaluate
/// for a minute with no word (sweep 71: 44 s of CPU for 4 MB).
pub const MAX_FORMULA_BYTES: usize = 20_000;
/// Stack size evaluated without allocation; deeper programs use a heap stack.
const INLINE_STACK: usize = 32;
/// Rows evaluated together by [`Formula::eval_rows`].
const LANES: usize = 64;

/// A parse error: message and 1-based column (character offset) in the formula text.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{message} at column {column}")]
pub struct ExprError {
    /// What is wrong, in words, naming the offending text.
    pub message: String,
    /// 1-based character (not byte) offset of the offending text in the formula.
    pub column: usize,
}

impl ExprError {
    fn new(message: impl Into<String>, column: usize) -> Self {
        ExprError {
            // A message quotes the offending text, which may be a 200 KB identifier.
            message: crate::fmt::clip(&message.into(), 300),
            column,
        }
    }
}

/// A two-operand operation.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Bin {
    Add,
    Sub,
    Mul,
    Div,
    Pow,
    Lt,
    Le,
    Gt,
    Ge,
    Eq,
    Ne,
    Min,
    Max,
    Atan2,
}

impl Bin {
    #[inline(always)]
    fn apply(self, a: f64, b: f64) -> f64 {
        match self {
            Bin::Add => a + b,
            Bin::Sub => a - b,
            Bin::Mul => a * b,
            Bin::Div => a / b,
            Bin::Pow => a.powf(b),
            Bin::Lt => compare(a, b, a < b),
            Bin::Le => compare(a, b, a <= b),
            Bin::Gt => compare(a, b, a > b),
            Bin::Ge => compare(a, b, a >= b),
            Bin::Eq => compare(a, b, a == b),
            Bin::Ne => compare(a, b, a != b),
            Bin::Min => nan_min(a, b),
            Bin::Max => nan_max(a, b),
            Bin::Atan2 => a.atan2(b),
        }
    }
}

/// One instruction of the stack program. The interpreter keeps the top of the stack in a
/// register; "top" below means that value.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Op {
    /// Pushes a constant.
    Const(f64),
    /// Pushes variable slot i.
    Var(usize),
    /// Pops b then a, pushes `a op b`.
    Bin(Bin),
    /// top = top op constant (a `Const` right operand fused in).
    BinC(Bin, f64),
    /// top = top op variable (a `Var` right operand fused in).
    BinV(Bin, usize),
    /// top = top * top (`^2` with a constant exponent).
    Square,
    /// Pops cond, a, b; pushes a if cond != 0, b if cond == 0, NaN if cond is NaN.
    Select,
    Neg,
    Sin,
    Cos,
    Tan,
    Exp,
    Ln,
    Log10,
    Sqrt,
    Abs,
    Tanh,
    Atan,
    Logistic,
}

impl Op {
    /// Net change of the stack height.
    fn stack_effect(self) -> isize {
        match self {
            Op::Const(_) | Op::Var(_) => 1,
            Op::Bin(_) => -1,
            Op::Select => -2,
            _ => 0,
        }
    }
}

/// How many arguments a function takes.
#[derive(Debug, Clone, Copy)]
enum Arity {
    Exactly(usize),
    AtLeast(usize),
}

/// What a function name compiles to.
#[derive(Debug, Clone, Copy)]
enum FuncKind {
    /// One argument, one instruction.
    Unary(Op),
    /// Two or more arguments folded left with the binary instruction.
    Fold(Op),
    Atan2,
    If,
}

/// The functions of the language, with their arity.
const FUNCTIONS: &[(&str, Arity, FuncKind)] = &[
    ("sin", Arity::Exactly(1), FuncKind::Unary(Op::Sin)),
    ("cos", Arity::Exactly(1), FuncKind::Unary(Op::Cos)),
    ("tan", Arity::Exactly(1), FuncKind::Unary(Op::Tan)),
    ("exp", Arity::Exactly(1), FuncKind::Unary(Op::Exp)),
    ("ln", Arity::Exactly(1), FuncKind::Unary(Op::Ln)),
    ("log10", Arity::Exactly(1), FuncKind::Unary(Op::Log10)),
    ("sqrt", Arity::Exactly(1), FuncKind::Unary(Op::Sqrt)),
    ("abs", Arity::Exactly(1), FuncKind::Unary(Op::Abs)),
    ("tanh", Arity::Exactly(1), FuncKind::Unary(Op::Tanh)),
    ("atan", Arity::Exactly(1), FuncKind::Unary(Op::Atan)),
    ("logistic", Arity::Exactly(1), FuncKind::Unary(Op::Logistic)),
    ("min", Arity::AtLeast(2), FuncKind::Fold(Op::Bin(Bin::Min))),
    ("max", Arity::AtLeast(2), FuncKind::Fold(Op::Bin(Bin::Max))),
    ("atan2", Arity::Exactly(2), FuncKind::Atan2),
    ("if", Arity::Exactly(3), FuncKind::If),
];

fn function_names() -> String {
    FUNCTIONS
        .iter()
        .map(|(n, _, _)| *n)
        .collect::<Vec<_>>()
        .join(", ")
}

/// A comparison's value: 1 or 0, and NaN when either side is NaN (an `f64` comparison with NaN
/// is simply false, which would turn `sqrt(x) > 0.5` at x < 0 into a silent 0).
#[inline(always)]
fn compare(a: f64, b: f64, holds: bool) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        f64::from(holds)
    }
}

#[inline]
fn nan_min(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.min(b)
    }
}

#[inline]
fn nan_max(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.max(b)
    }
}

/// Runs a stack program; `st` must be at least as long as the program's maximum stack depth.
fn run(ops: &[Op], values: &[f64], st: &mut [f64]) -> f64 {
    // `top` caches the top of the stack; st[..sp] holds the values below it (st[0] receives
    // the meaningless initial `top` on the first push).
    let mut top = 0.0f64;
    let mut sp = 0usize;
    for op in ops {
        match *op {
            Op::Const(c) => {
                st[sp] = top;
                sp += 1;
                top = c;
            }
            Op::Var(i) => {
                st[sp] = top;
                sp += 1;
                top = values[i];
            }
            Op::Bin(b) => {
                sp -= 1;
                top = b.apply(st[sp], top);
            }
            Op::BinC(Bin::Add, c) => top += c,
            Op::BinC(Bin::Sub, c) => top -= c,
            Op::BinC(Bin::Mul, c) => top *= c,
            Op::BinC(Bin::Div, c) => top /= c,
            Op::BinC(b, c) => top = b.apply(top, c),
            Op::BinV(Bin::Add, i) => top += values[i],
            Op::BinV(Bin::Sub, i) => top -= values[i],
            Op::BinV(Bin::Mul, i) => top *= values[i],
            Op::BinV(Bin::Div, i) => top /= values[i],
            Op::BinV(b, i) => top = b.apply(top, values[i]),
            Op::Square => top *= top,
            Op::Select => {
                sp -= 2;
                let c = st[sp];
                top = if c.is_nan() {
                    f64::NAN
                } else if c != 0.0 {
                    st[sp + 1]
                } else {
                    top
                };
            }
            Op::Neg => top = -top,
            Op::Sin => top = top.sin(),
            Op::Cos => top = top.cos(),
            Op::Tan => top = top.tan(),
            Op::Exp => top = top.exp(),
            Op::Ln => top = top.ln(),
            Op::Log10 => top = top.log10(),
            Op::Sqrt => top = top.sqrt(),
            Op::Abs => top = top.abs(),
            Op::Tanh => top = top.tanh(),
            Op::Atan => top = top.atan(),
            Op::Logistic => top = 1.0 / (1.0 + (-top).exp()),
        }
    }
    top
}

#[inline(always)]
fn map1(top: &mut [f64], f: impl Fn(f64) -> f64) {
    top.iter_mut().for_each(|t| *t = f(*t));
}

#[inline(always)]
fn map2(top: &mut [f64], rhs: &[f64], f: impl Fn(f64, f64) -> f64) {
    top.iter_mut().zip(rhs).for_each(|(t, r)| *t = f(*t, *r));
}

/// top[r] = top[r] op rhs[r] for every lane.
fn lanes_bin(b: Bin, top: &mut [f64], rhs: &[f64]) {
    match b {
        Bin::Add => map2(top, rhs, |x, y| x + y),
        Bin::Sub => map2(top, rhs, |x, y| x - y),
        Bin::Mul => map2(top, rhs, |x, y| x * y),
        Bin::Div => map2(top, rhs, |x, y| x / y),
        Bin::Pow => map2(top, rhs, f64::powf),
        other => map2(top, rhs, |x, y| other.apply(x, y)),
    }
}

/// Maximum stack height reached by a well-formed program.
fn max_depth(ops: &[Op]) -> usize {
    let mut h = 0isize;
    let mut m = 0isize;
    for op in ops {
        h += op.stack_effect();
        m = m.max(h);
    }
    m.max(1) as usize
}

/// A parsed formula: its source text and a compiled stack program.
#[derive(Debug, Clone)]
pub struct Formula {
    source: String,
    ops: Vec<Op>,
    depth: usize,
}

impl Formula {
    /// Parses `src`; variables are resolved against `vars` (slot i = vars[i]; with duplicate
    /// names the first wins). Unknown identifiers are errors ("undefined variable `foo`; known:
    /// a, b"), as are unknown functions, wrong argument counts, trailing input, empty input,
    /// unbalanced parentheses, chained comparisons and nesting deeper than 100 levels.
    pub fn parse(src: &str, vars: &[&str]) -> Result<Formula, ExprError> {
        if src.len() > MAX_FORMULA_BYTES {
            return Err(ExprError::new(
                format!(
                    "the formula is {} bytes long; at most {MAX_FORMULA_BYTES} are accepted",
                    src.len()
                ),
                1,
            ));
        }
        let toks = lex(src)?;
        let mut p = Parser {
            toks,
            pos: 0,
            ops: Vec::new(),
            vars,
            index: (vars.len() > 32).then(|| {
                let mut m = std::collections::HashMap::with_capacity(vars.len());
                for (i, v) in vars.iter().enumerate() {
                    m.entry(*v).or_insert(i);
                }
                m
            }),
            nesting: 0,
        };
        if matches!(p.peek().tok, Tok::End) {
            return Err(ExprError::new("empty formula", 1));
        }
        p.comparison()?;
        let t = p.peek();
        match t.tok {
            Tok::End => {}
            Tok::RParen => return Err(ExprError::new("unmatched `)` (no `(` opens it)", t.col)),
            _ => {
                return Err(ExprError::new(
                    format!(
                        "unexpected {} after a complete expression (missing operator?)",
                        t.tok.describe()
                    ),
                    t.col,
                ))
            }
        }
        let depth = max_depth(&p.ops);
        Ok(Formula {
            source: src.to_string(),
            ops: p.ops,
            depth,
        })
    }

    /// Evaluates with values[i] for slot i (values.len() >= number of vars). May return
    /// NaN/inf; caller checks.
    ///
    /// # Panics
    /// If `values` is shorter than a variable slot the formula uses (a caller bug, never
    /// caused by formula text).
    #[inline]
    pub fn eval(&self, values: &[f64]) -> f64 {
        match self.ops.as_slice() {
            [Op::Const(c)] => *c,
            [Op::Var(i)] => values[*i],
            ops if self.depth <= INLINE_STACK => {
                let mut st = [0.0f64; INLINE_STACK];
                run(ops, values, &mut st)
            }
            ops => {
                let mut st = vec![0.0f64; self.depth];
                run(ops, values, &mut st)
            }
        }
    }

    /// Evaluates the formula at every row of `rows` (row r holds the variable values, slot i in
    /// column i) into `out[r]`. Gives bit-identical results to calling [`Formula::eval`] per
    /// row, several times faster, because each instruction runs over a block of rows at once.
    ///
    /// # Panics
    /// If `out.len() != rows.nrows()` or `rows` has fewer columns than a variable slot the
    /// formula uses (caller bugs, never caused by formula text).
    pub fn eval_rows(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        assert_eq!(
            out.len(),
            rows.nrows(),
            "eval_rows: output length must equal the number of rows"
        );
        if let Some(c) = self.constant_value() {
            out.fill(c);
            return;
        }
        let mut stack = vec![0.0f64; self.depth * LANES];
        let mut aux = [0.0f64; LANES];
        for (block, out_block) in out.chunks_mut(LANES).enumerate() {
            let start = block * LANES;
            let m = out_block.len();
            let x = rows.slice(s![start..start + m, ..]);
            let top = out_block;
            let aux = &mut aux[..m];
            let mut sp = 0usize;
            for op in &self.ops {
                match *op {
                    Op::Const(_) | Op::Var(_) => {
                        stack[sp * LANES..sp * LANES + m].copy_from_slice(top);
                        sp += 1;
                        match *op {
                            Op::Const(c) => top.fill(c),
                            Op::Var(i) => {
                                top.iter_mut().zip(x.column(i)).for_each(|(t, v)| *t = *v)
                            }
                            _ => {}
                        }
                    }
                    Op::Bin(b) => {
                        sp -= 1;
                        aux.copy_from_slice(top);
                        top.copy_from_slice(&stack[sp * LANES..sp * LANES + m]);
                        lanes_bin(b, top, aux);
                    }
                    Op::BinC(b, c) => {
                        aux.fill(c);
                        lanes_bin(b, top, aux);
                    }
                    Op::BinV(b, i) => {
                        aux.iter_mut().zip(x.column(i)).for_each(|(a, v)| *a = *v);
                        lanes_bin(b, top, aux);
                    }
                    Op::Select => {
                        sp -= 2;
                        let cond = &stack[sp * LANES..sp * LANES + m];
                        let first = &stack[(sp + 1) * LANES..(sp + 1) * LANES + m];
                        for ((t, &c), &a) in top.iter_mut().zip(cond).zip(first) {
                            *t = if c.is_nan() {
                                f64::NAN
                            } else if c != 0.0 {
                                a
                            } else {
                                *t
                            };
                        }
                    }
                    Op::Square => map1(top, |t| t * t),
                    Op::Neg => map1(top, |t| -t),
                    Op::Sin => map1(top, f64::sin),
                    Op::Cos => map1(top, f64::cos),
                    Op::Tan => map1(top, f64::tan),
                    Op::Exp => map1(top, f64::exp),
                    Op::Ln => map1(top, f64::ln),
                    Op::Log10 => map1(top, f64::log10),
                    Op::Sqrt => map1(top, f64::sqrt),
                    Op::Abs => map1(top, f64::abs),
                    Op::Tanh => map1(top, f64::tanh),
                    Op::Atan => map1(top, f64::atan),
                    Op::Logistic => map1(top, |t| 1.0 / (1.0 + (-t).exp())),
                }
            }
        }
    }

    /// The source text.
    pub fn source(&self) -> &str {
        &self.source
    }

    /// Indices of the variables the formula uses (sorted, without repeats). Variables removed
    /// by constant folding, such as the untaken branch of `if(1, a, b)`, are not listed.
    pub fn used_vars(&self) -> Vec<usize> {
        let mut v: Vec<usize> = self
            .ops
            .iter()
            .filter_map(|op| match op {
                Op::Var(i) | Op::BinV(_, i) => Some(*i),
                _ => None,
            })
            .collect();
        v.sort_unstable();
        v.dedup();
        v
    }

    /// The value if the formula folded to a constant (it uses no variable).
    pub fn constant_value(&self) -> Option<f64> {
        match self.ops.as_slice() {
            [Op::Const(c)] => Some(*c),
            _ => None,
        }
    }
}

// ---------------------------------------------------------------- lexer

#[derive(Debug, Clone, PartialEq)]
enum Tok {
    Num(f64, String),
    Ident(String),
    Plus,
    Minus,
    Star,
    Slash,
    Caret,
    LParen,
    RParen,
    Comma,
    Lt,
    Le,
    Gt,
    Ge,
    EqEq,
    Ne,
    End,
}

impl Tok {
    fn describe(&self) -> String {
        match self {
            Tok::Num(_, s) => format!("number `{s}`"),
            Tok::Ident(s) => format!("name `{s}`"),
            Tok::Plus => "`+`".into(),
            Tok::Minus => "`-`".into(),
            Tok::Star => "`*`".into(),
            Tok::Slash => "`/`".into(),
            Tok::Caret => "`^`".into(),
            Tok::LParen => "`(`".into(),
            Tok::RParen => "`)`".into(),
            Tok::Comma => "`,`".into(),
            Tok::Lt => "`<`".into(),
            Tok::Le => "`<=`".into(),
            Tok::Gt => "`>`".into(),
            Tok::Ge => "`>=`".into(),
            Tok::EqEq => "`==`".into(),
            Tok::Ne => "`!=`".into(),
            Tok::End => "the end of the formula".into(),
        }
    }

    fn comparison(&self) -> Option<Op> {
        Some(match self {
            Tok::Lt => Op::Bin(Bin::Lt),
            Tok::Le => Op::Bin(Bin::Le),
            Tok::Gt => Op::Bin(Bin::Gt),
            Tok::Ge => Op::Bin(Bin::Ge),
            Tok::EqEq => Op::Bin(Bin::Eq),
            Tok::Ne => Op::Bin(Bin::Ne),
            _ => return None,
        })
    }
}

#[derive(Debug, Clone)]
struct Token {
    tok: Tok,
    /// 1-based character column of the token's first character.
    col: usize,
}

fn lex(src: &str) -> Result<Vec<Token>, ExprError> {
    let chars: Vec<char> = src.chars().collect();
    let n = chars.len();
    let at = |i: usize| chars.get(i).copied();
    let mut toks = Vec::new();
    let mut i = 0;
    while i < n {
        let c = chars[i];
        let col = i + 1;
        if c.is_whitespace() {
            i += 1;
            continue;
        }
        let is_digit = |o: Option<char>| o.is_some_and(|d| d.is_ascii_digit());
        if c.is_ascii_digit() || (c == '.' && is_digit(at(i + 1))) {
            let start = i;
            while is_digit(at(i)) {
                i += 1;
            }
            if at(i) == Some('.') {
                i += 1;
                while is_digit(at(i)) {
                    i += 1;
                }
            }
            if matches!(at(i), Some('e' | 'E')) {
                let sign = matches!(at(i + 1), Some('+' | '-'));
                let first = if sign { i + 2 } else { i + 1 };
                if is_digit(at(first)) {
                    i = first;
                    while is_digit(at(i)) {
                        i += 1;
                    }
                }
            }
            let text: String = chars[start..i].iter().collect();
            let v: f64 = text
                .parse()
                .map_err(|_| ExprError::new(format!("malformed number `{text}`"), col))?;
            if !v.is_finite() {
                return Err(ExprError::new(
                    format!("number `{text}` is too large for a 64-bit float"),
                    col,
                ));
            }
            toks.push(Token {
                tok: Tok::Num(v, text),
                col,
            });
            continue;
        }
        if c.is_ascii_alphabetic() || c == '_' {
            let start = i;
            while at(i).is_some_and(|d| d.is_ascii_alphanumeric() || d == '_') {
                i += 1;
            }
            toks.push(Token {
                tok: Tok::Ident(chars[start..i].iter().collect()),
                col,
            });
            continue;
        }
        let next_eq = at(i + 1) == Some('=');
        let (tok, len) = match c {
            '+' => (Tok::Plus, 1),
            '-' => (Tok::Minus, 1),
            '*' => (Tok::Star, 1),
            '/' => (Tok::Slash, 1),
            '^' => (Tok::Caret, 1),
            '(' => (Tok::LParen, 1),
            ')' => (Tok::RParen, 1),
            ',' => (Tok::Comma, 1),
            '<' if next_eq => (Tok::Le, 2),
            '<' => (Tok::Lt, 1),
            '>' if next_eq => (Tok::Ge, 2),
            '>' => (Tok::Gt, 1),
            '=' if next_eq => (Tok::EqEq, 2),
            '!' if next_eq => (Tok::Ne, 2),
            '=' => return Err(ExprError::new("unexpected `=`; write `==` to compare", col)),
            '!' => {
                return Err(ExprError::new(
                    "unexpected `!`; write `!=` for \"not equal\" or `x == 0` for \"not x\"",
                    col,
                ))
            }
            other => {
                return Err(ExprError::new(
                    format!("unexpected character `{other}`"),
                    col,
                ))
            }
        };
        toks.push(Token { tok, col });
        i += len;
    }
    toks.push(Token {
        tok: Tok::End,
        col: n + 1,
    });
    Ok(toks)
}

// ---------------------------------------------------------------- parser / code generator

struct Parser<'a> {
    toks: Vec<Token>,
    pos: usize,
    ops: Vec<Op>,
    vars: &'a [&'a str],
    /// Index of each variable name, built only for long variable lists (a scan is faster for a
    /// few names; a map keeps a formula over 100 000 inputs linear).
    index: Option<std::collections::HashMap<&'a str, usize>>,
    nesting: usize,
}

impl Parser<'_> {
    /// Position of variable `name` in the variable list (the first, if named twice).
    fn var_index(&self, name: &str) -> Option<usize> {
        match &self.index {
            Some(m) => m.get(name).copied(),
            None => self.vars.iter().position(|v| *v == name),
        }
    }

    fn peek(&self) -> &Token {
        // The token list always ends with `End`, and `pos` never moves past it.
        &self.toks[self.pos.min(self.toks.len() - 1)]
    }

    fn bump(&mut self) -> Token {
        let t = self.peek().clone();
        if !matches!(t.tok, Tok::End) {
            self.pos += 1;
        }
        t
    }

    fn enter(&mut self, col: usize) -> Result<(), ExprError> {
        self.nesting += 1;
        if self.nesting > MAX_NESTING {
            return Err(ExprError::new(
                format!("formula nested more than {MAX_NESTING} levels deep"),
                col,
            ));
        }
        Ok(())
    }

    fn leave(&mut self) {
        self.nesting -= 1;
    }

    /// Appends `op`, whose `arity` operands are the code from `first` on; folds it to a
    /// constant when every operand is a single constant, and fuses a single-instruction
    /// constant or variable right operand of a two-operand `op` into it.
    fn emit(&mut self, first: usize, arity: usize, op: Op) {
        self.ops.push(op);
        let span = &self.ops[first..];
        if span.len() == arity + 1 && span[..arity].iter().all(|o| matches!(o, Op::Const(_))) {
            let mut st = [0.0f64; 4];
            let v = run(span, &[], &mut st);
            self.ops.truncate(first);
            self.ops.push(Op::Const(v));
            return;
        }
        if let Op::Bin(b) = op {
            let n = self.ops.len();
            // The right operand is the instruction just before `op` only if it is a whole
            // operand by itself: Const and Var are, and the left operand starts at `first`.
            if n >= first + 3 {
                let fused = match self.ops[n - 2] {
                    Op::Const(c) if b == Bin::Pow && c == 2.0 => Some(Op::Square),
                    Op::Const(c) => Some(Op::BinC(b, c)),
                    Op::Var(i) => Some(Op::BinV(b, i)),
                    _ => None,
                };
                if let Some(f) = fused {
                    self.ops.truncate(n - 2);
                    self.ops.push(f);
                }
            }
        }
    }

    /// comparison := sum (cmp sum)?
    fn comparison(&mut self) -> Result<(), ExprError> {
        let first = self.ops.len();
        self.sum()?;
        if let Some(op) = self.peek().tok.comparison() {
            self.bump();
            self.sum()?;
            self.emit(first, 2, op);
            let t = self.peek();
            if t.tok.comparison().is_some() {
                return Err(ExprError::new(
                    format!(
                        "comparisons do not chain: {} after a comparison; write e.g. `(a < x) * (x < b)`",
                        t.tok.describe()
                    ),
                    t.col,
                ));
            }
        }
        Ok(())
    }

    /// sum := product (('+' | '-') product)*
    fn sum(&mut self) -> Result<(), ExprError> {
        let first = self.ops.len();
        self.product()?;
        loop {
            let op = match self.peek().tok {
                Tok::Plus => Op::Bin(Bin::Add),
                Tok::Minus => Op::Bin(Bin::Sub),
                _ => return Ok(()),
            };
            self.bump();
            self.product()?;
            self.emit(first, 2, op);
        }
    }

    /// product := unary (('*' | '/') unary)*
    fn product(&mut self) -> Result<(), ExprError> {
        let first = self.ops.len();
        self.unary()?;
        loop {
            let op = match self.peek().tok {
                Tok::Star => Op::Bin(Bin::Mul),
                Tok::Slash => Op::Bin(Bin::Div),
                _ => return Ok(()),
            };
            self.bump();
            self.unary()?;
            self.emit(first, 2, op);
        }
    }

    /// unary := ('-' | '+') unary | power
    fn unary(&mut self) -> Result<(), ExprError> {
        let t = self.peek().clone();
        match t.tok {
            Tok::Minus | Tok::Plus => {
                self.bump();
                self.enter(t.col)?;
                let first = self.ops.len();
                self.unary()?;
                if matches!(t.tok, Tok::Minus) {
                    self.emit(first, 1, Op::Neg);
                }
                self.leave();
                Ok(())
            }
            _ => self.power(),
        }
    }

    /// power := primary ('^' unary)?   (right-associative through `unary`)
    fn power(&mut self) -> Result<(), ExprError> {
        let first = self.ops.len();
        self.primary()?;
        let t = self.peek().clone();
        if matches!(t.tok, Tok::Caret) {
            self.bump();
            self.enter(t.col)?;
            self.unary()?;
            self.emit(first, 2, Op::Bin(Bin::Pow));
            self.leave();
        }
        Ok(())
    }

    /// primary := number | name | name '(' args ')' | '(' comparison ')'
    fn primary(&mut self) -> Result<(), ExprError> {
        let t = self.bump();
        match t.tok {
            Tok::Num(v, _) => {
                self.ops.push(Op::Const(v));
                Ok(())
            }
            Tok::LParen => {
                self.enter(t.col)?;
                self.comparison()?;
                self.close_paren(t.col)?;
                self.leave();
                Ok(())
            }
            Tok::Ident(name) => {
                if matches!(self.peek().tok, Tok::LParen) {
                    return self.call(&name, t.col);
                }
                if let Some(i) = self.var_index(&name) {
                    self.ops.push(Op::Var(i));
                } else if name == "pi" {
                    self.ops.push(Op::Const(std::f64::consts::PI));
                } else if name == "e" {
                    self.ops.push(Op::Const(std::f64::consts::E));
                } else {
                    let known = if self.vars.is_empty() {
                        "no variables are defined".to_string()
                    } else {
                        format!("known: {}", self.vars.join(", "))
                    };
                    let hint = if FUNCTIONS.iter().any(|(n, _, _)| *n == name) {
                        format!(" (`{name}` is a function: write `{name}(...)`)")
                    } else {
                        String::new()
                    };
                    return Err(ExprError::new(
                        format!("undefined variable `{name}`; {known}{hint}"),
                        t.col,
                    ));
                }
                Ok(())
            }
            Tok::End => Err(ExprError::new(
                "formula ends too early: expected a number, variable, function or `(`",
                t.col,
            )),
            other => Err(ExprError::new(
                format!(
                    "expected a number, variable, function or `(`, found {}",
                    other.describe()
                ),
                t.col,
            )),
        }
    }

    /// Consumes the `)` closing the `(` at column `open`.
    fn close_paren(&mut self, open: usize) -> Result<(), ExprError> {
        let t = self.peek().clone();
        match t.tok {
            Tok::RParen => {
                self.bump();
                Ok(())
            }
            Tok::End => Err(ExprError::new(
                "unclosed `(`: missing `)` before the end of the formula",
                open,
            )),
            other => Err(ExprError::new(
                format!("expected `)` or an operator, found {}", other.describe()),
                t.col,
            )),
        }
    }

    /// A call `name(args)`; the current token is the `(`.
    fn call(&mut self, name: &str, col: usize) -> Result<(), ExprError> {
        let Some(&(_, arity, kind)) = FUNCTIONS.iter().find(|(n, _, _)| *n == name) else {
            let hint = match name {
                "log" => "; write `ln` (natural) or `log10`".to_string(),
                _ if self.var_index(name).is_some() => {
                    format!("; `{name}` is a variable (write `{name}*(...)` to multiply)")
                }
                _ => format!("; known: {}", function_names()),
            };
            return Err(ExprError::new(
                format!("unknown function `{name}`{hint}"),
                col,
            ));
        };
        let open = self.bump().col;
        self.enter(open)?;
        let first = self.ops.len();
        let mut starts = Vec::new();
        if !matches!(self.peek().tok, Tok::RParen) {
            loop {
                starts.push(self.ops.len());
                self.comparison()?;
                if let FuncKind::Fold(op) = kind {
                    if starts.len() >= 2 {
                        self.emit(first, 2, op);
                    }
                }
                if matches!(self.peek().tok, Tok::Comma) {
                    self.bump();
                } else {
                    break;
                }
            }
        }
        let t = self.peek().clone();
        match t.tok {
            Tok::RParen => {
                self.bump();
            }
            Tok::End => {
                return Err(ExprError::new(
                    format!("unclosed `(` of `{name}(`: missing `)` before the end of the formula"),
                    open,
                ))
            }
            other => {
                return Err(ExprError::new(
                    format!(
                        "expected `,` or `)` in the arguments of `{name}`, found {}",
                        other.describe()
                    ),
                    t.col,
                ))
            }
        }
        let got = starts.len();
        let ok = match arity {
            Arity::Exactly(k) => got == k,
            Arity::AtLeast(k) => got >= k,
        };
        if !ok {
            let want = match arity {
                Arity::Exactly(1) => "exactly 1 argument".to_string(),
                Arity::Exactly(k) => format!("exactly {k} arguments"),
                Arity::AtLeast(k) => format!("at least {k} arguments"),
            };
            return Err(ExprError::new(
                format!("`{name}` takes {want}, got {got}"),
                col,
            ));
        }
        match kind {
            FuncKind::Unary(op) => self.emit(first, 1, op),
            FuncKind::Fold(_) => {} // emitted while parsing the arguments
            FuncKind::Atan2 => self.emit(first, 2, Op::Bin(Bin::Atan2)),
            FuncKind::If => {
                let (a, b) = (starts[1], starts[2]);
                match self.ops[first..a] {
                    [Op::Const(c)] if !c.is_nan() => {
                        if c != 0.0 {
                            self.ops.truncate(b);
                            self.ops.remove(first);
                        } else {
                            self.ops.drain(first..b);
                        }
                    }
                    _ => self.emit(first, 3, Op::Select),
                }
            }
        }
        self.leave();
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::{E, PI};

    fn ev(src: &str, vars: &[&str], vals: &[f64]) -> f64 {
        Formula::parse(src, vars)
            .unwrap_or_else(|e| panic!("{src}: {e}"))
            .eval(vals)
    }

    fn c(src: &str) -> f64 {
        ev(src, &[], &[])
    }

    fn err(src: &str, vars: &[&str]) -> ExprError {
        match Formula::parse(src, vars) {
            Ok(f) => panic!("{src} parsed: {:?}", f.ops),
            Err(e) => e,
        }
    }

    // Expected values below are exact identities of arithmetic with the stated precedence.
    #[test]
    fn precedence_and_associativity() {
        assert_eq!(c("1+2*3"), 7.0);
        assert_eq!(c("(1+2)*3"), 9.0);
        assert_eq!(c("10-4-3"), 3.0);
        assert_eq!(c("64/4/2"), 8.0);
        assert_eq!(c("2*3^2"), 18.0);
        assert_eq!(c("2^3^2"), 512.0); // right-associative: 2^(3^2)
        assert_eq!(c("(2^3)^2"), 64.0);
        assert_eq!(c("-2^2"), -4.0); // -(2^2)
        assert_eq!(c("(-2)^2"), 4.0);
        assert_eq!(c("2^-1"), 0.5);
        assert_eq!(c("2^-1^2"), 0.5); // 2^(-(1^2))
        assert_eq!(c("--3"), 3.0);
        assert_eq!(c("+3"), 3.0);
        assert_eq!(c("-3 - -3"), 0.0);
        assert_eq!(c("2*-3"), -6.0);
        assert_eq!(c("1+2 < 4"), 1.0); // comparison is lowest: (1+2) < 4
        assert_eq!(c("1 + (2 < 4)"), 2.0);
        assert_eq!(c("2*3 == 6"), 1.0);
        assert_eq!(c("1 != 1"), 0.0);
        assert_eq!(c("2 <= 2"), 1.0);
        assert_eq!(c("2 < 2"), 0.0);
        assert_eq!(c("2 >= 3"), 0.0);
        assert_eq!(c("3 > 2"), 1.0);
        assert_eq!(c(" \t1 +\n2 "), 3.0);
        let x = [3.0];
        assert_eq!(ev("-x^2", &["x"], &x), -9.0);
        assert_eq!(ev("2^-x^2", &["x"], &[1.0]), 0.5);
        assert_eq!(ev("x - 1 - 1", &["x"], &x), 1.0);
        assert_eq!(ev("x / 2 / 3", &["x"], &[12.0]), 2.0);
    }

    #[test]
    fn numbers_and_constants() {
        assert_eq!(c("2"), 2.0);
        assert_eq!(c("0.5"), 0.5);
        assert_eq!(c(".5"), 0.5);
        assert_eq!(c("5."), 5.0);
        assert_eq!(c("1e-3"), 1e-3);
        assert_eq!(c("2.5E+2"), 250.0);
        assert_eq!(c("3e2"), 300.0);
        assert_eq!(c("pi"), PI);
        assert_eq!(c("e"), E);
        assert_eq!(c("2*e"), 2.0 * E);
        // A variable shadows the constant of the same name.
        assert_eq!(ev("e + pi", &["e", "pi"], &[2.0, 3.0]), 5.0);
        assert_eq!(ev("e", &["x", "e"], &[7.0, 2.0]), 2.0);
        // Duplicate names: the first slot wins.
        assert_eq!(ev("a", &["a", "a"], &[1.0, 2.0]), 1.0);
    }

    #[test]
    fn functions_match_std() {
        // Reference: Rust's f64 methods (std), evaluated at the same points.
        let pts = [-2.3, -0.7, 0.0, 0.4, 1.0, 2.9, 15.0];
        type Reference = fn(f64) -> f64;
        let cases: &[(&str, Reference)] = &[
            ("sin", f64::sin),
            ("cos", f64::cos),
            ("tan", f64::tan),
            ("exp", f64::exp),
            ("ln", f64::ln),
            ("log10", f64::log10),
            ("sqrt", f64::sqrt),
            ("abs", f64::abs),
            ("tanh", f64::tanh),
            ("atan", f64::atan),
            ("logistic", |z| 1.0 / (1.0 + (-z).exp())),
        ];
        for (name, f) in cases {
            let formula = Formula::parse(&format!("{name}(x)"), &["x"]).unwrap();
            for &x in &pts {
                let got = formula.eval(&[x]);
                let want = f(x);
                assert!(
                    got == want || (got.is_nan() && want.is_nan()),
                    "{name}({x}) = {got}, std gives {want}"
                );
                // The constant-folded path agrees too.
                assert_eq!(c(&format!("{name}({x})")).to_bits(), want.to_bits());
            }
        }
        let xy = ["y", "x"];
        for &y in &pts {
            for &x in &pts {
                assert_eq!(ev("atan2(y, x)", &xy, &[y, x]), y.atan2(x));
                assert_eq!(ev("min(y, x)", &xy, &[y, x]), y.min(x));
                assert_eq!(ev("max(y, x)", &xy, &[y, x]), y.max(x));
                assert_eq!(ev("y ^ x", &xy, &[y, x]).to_bits(), y.powf(x).to_bits());
                assert_eq!(
                    ev("(y ^ x) - x", &xy, &[y, x]).to_bits(),
                    (y.powf(x) - x).to_bits()
                );
                assert_eq!(ev("x - (y ^ 3)", &xy, &[y, x]), x - y.powf(3.0));
            }
        }
        let v = ["a", "b", "c", "d"];
        let vals = [3.0, -1.0, 7.5, 2.0];
        assert_eq!(ev("min(a, b, c, d)", &v, &vals), -1.0);
        assert_eq!(ev("max(a, b, c, d)", &v, &vals), 7.5);
        assert_eq!(c("max(1, 5, 3)"), 5.0);
        assert_eq!(ev("a ^ 2", &v, &vals), 9.0); // squared by multiplication, exact here
        assert_eq!(ev("b ^ 2", &v, &vals), 1.0);
        assert_eq!(ev("if(a > 2, b, c)", &v, &vals), -1.0);
        assert_eq!(ev("if(a > 4, b, c)", &v, &vals), 7.5);
        assert_eq!(ev("if(b, c, d)", &v, &vals), 7.5); // nonzero condition picks the first branch
        assert_eq!(ev("if(a - 3, c, d)", &v, &vals), 2.0);
        // logistic saturates without NaN.
        assert_eq!(c("logistic(-1000)"), 0.0);
        assert_eq!(c("logistic(1000)"), 1.0);
        assert_eq!(c("logistic(0)"), 0.5);
    }

    #[test]
    fn nan_is_not_hidden() {
        assert!(ev("min(x, 1)", &["x"], &[f64::NAN]).is_nan());
        assert!(ev("max(1, x)", &["x"], &[f64::NAN]).is_nan());
        assert!(ev("if(x, 1, 2)", &["x"], &[f64::NAN]).is_nan());
        for f in [
            "(x > 0.5)",
            "(x < 0)",
            "(x == x)",
            "(x != 1)",
            "(1 <= x)",
            "(x >= 1)",
        ] {
            assert!(ev(f, &["x"], &[f64::NAN]).is_nan(), "{f}");
            assert!(ev(&format!("{f} + 1"), &["x"], &[f64::NAN]).is_nan(), "{f}");
        }
        assert_eq!(ev("(x > 0.5)", &["x"], &[0.7]), 1.0);
        assert_eq!(ev("(x > 0.5)", &["x"], &[0.2]), 0.0);
        assert!(c("sqrt(-1)").is_nan());
        assert!(c("1/0").is_infinite());
        // The untaken branch's NaN does not leak.
        assert_eq!(ev("if(x > 0, sqrt(x), 0)", &["x"], &[-4.0]), 0.0);
    }

    #[test]
    fn errors_and_columns() {
        let e = err("a + foo", &["a", "b"]);
        assert_eq!(e.message, "undefined variable `foo`; known: a, b");
        assert_eq!(e.column, 5);
        assert_eq!(
            e.to_string(),
            "undefined variable `foo`; known: a, b at column 5"
        );
        assert_eq!(
            err("foo", &[]).message,
            "undefined variable `foo`; no variables are defined"
        );
        assert!(err("sin + 1", &["x"]).message.contains("is a function"));

        let e = err("2 +* x", &["x"]);
        assert_eq!(e.column, 4);
        assert!(e.message.contains("found `*`"), "{}", e.message);

        let e = err("(2+3", &[]);
        assert_eq!(e.column, 1);
        assert!(e.message.contains("unclosed `(`"));
        let e = err("1 + ((2+3)", &[]);
        assert_eq!(e.column, 5);
        let e = err("2+3)", &[]);
        assert_eq!(e.column, 4);
        assert!(e.message.contains("unmatched `)`"));
        let e = err("sin(x", &["x"]);
        assert_eq!(e.column, 4);
        let e = err("(2 3)", &[]);
        assert_eq!(e.column, 4);
        assert!(e.message.contains("expected `)`"));
        let e = err("max(1 2)", &[]);
        assert_eq!(e.column, 7);

        let e = err("x + foo(1)", &["x"]);
        assert_eq!(e.column, 5);
        assert!(e.message.starts_with("unknown function `foo`; known: sin"));
        assert!(err("log(2)", &[]).message.contains("`ln`"));
        assert!(err("x(2)", &["x"]).message.contains("is a variable"));

        let e = err("1 + sin(1, 2)", &[]);
        assert_eq!(e.column, 5);
        assert_eq!(e.message, "`sin` takes exactly 1 argument, got 2");
        assert_eq!(
            err("atan2(1)", &[]).message,
            "`atan2` takes exactly 2 arguments, got 1"
        );
        assert_eq!(
            err("min(1)", &[]).message,
            "`min` takes at least 2 arguments, got 1"
        );
        assert_eq!(
            err("if(1, 2)", &[]).message,
            "`if` takes exactly 3 arguments, got 2"
        );
        assert_eq!(
            err("cos()", &[]).message,
            "`cos` takes exactly 1 argument, got 0"
        );

        for empty in ["", "   ", "\t\n"] {
            let e = err(empty, &[]);
            assert_eq!((e.message.as_str(), e.column), ("empty formula", 1));
        }

        let e = err("2 3", &[]);
        assert_eq!(e.column, 3);
        assert!(e.message.contains("number `3`"));
        assert_eq!(err("2x", &["x"]).column, 2);
        assert_eq!(err("2 +", &[]).column, 4);
        assert_eq!(err("0 < x < 1", &["x"]).column, 7);
        assert_eq!(err("x = 1", &["x"]).column, 3);
        assert_eq!(err("!x", &["x"]).column, 1);
        assert_eq!(err("1e999", &[]).column, 1);
        // Columns count characters, not bytes.
        let e = err("é + 1", &[]);
        assert_eq!(
            (e.column, e.message.as_str()),
            (1, "unexpected character `é`")
        );
        assert_eq!(err("\"é\" + x", &["x"]).column, 1);
        assert_eq!(err("1 + é", &[]).column, 5);
        assert_eq!(err("(é) + foo", &[]).column, 2);
        assert_eq!(err("\u{3bb} * 2 + foo", &[]).column, 1);
        assert_eq!(err("2 * \u{3bb}", &[]).column, 5);
    }

    #[test]
    fn deep_input_is_an_error_not_a_crash() {
        let deep = format!("{}1{}", "(".repeat(5_000), ")".repeat(5_000));
        assert!(err(&deep, &[]).message.contains("nested"));
        assert!(err(&"-".repeat(10_000), &[]).message.contains("nested"));
        assert!(err(&"2^".repeat(9_000), &[]).message.contains("nested"));
        // Long flat chains are loops, not recursion.
        let long = vec!["x"; 10_000].join("+");
        assert_eq!(ev(&long, &["x"], &[1.0]), 10_000.0);
        // Beyond the length limit: refused before it is read.
        let longer = vec!["x"; 10_001].join("+");
        assert_eq!(
            err(&longer, &["x"]).message,
            "the formula is 20001 bytes long; at most 20000 are accepted"
        );
    }

    #[test]
    fn deep_stack_uses_heap_path() {
        // x+(x+(x+...)) keeps every left operand on the stack: depth 60 > INLINE_STACK.
        let n = 60;
        let s = format!("{}x{}", "x+(".repeat(n), ")".repeat(n));
        let f = Formula::parse(&s, &["x"]).unwrap();
        assert!(f.depth > INLINE_STACK);
        assert_eq!(f.eval(&[1.0]), (n + 1) as f64);
    }

    #[test]
    fn folding_and_used_vars() {
        let f = Formula::parse("2*pi*(1+1)", &[]).unwrap();
        assert_eq!(f.constant_value(), Some(4.0 * PI));
        let f = Formula::parse("x1 + sin(x3) * x1", &["x1", "x2", "x3"]).unwrap();
        assert_eq!(f.used_vars(), vec![0, 2]);
        assert_eq!(f.source(), "x1 + sin(x3) * x1");
        assert_eq!(f.constant_value(), None);
        let f = Formula::parse("3*x + 2*4", &["x"]).unwrap();
        assert_eq!(
            f.ops,
            vec![
                Op::Const(3.0),
                Op::BinV(Bin::Mul, 0),
                Op::BinC(Bin::Add, 8.0)
            ]
        );
        // A constant condition keeps only the taken branch.
        let f = Formula::parse("if(1 < 2, x, y)", &["x", "y"]).unwrap();
        assert_eq!(f.ops, vec![Op::Var(0)]);
        let f = Formula::parse("if(0, x, y + 1)", &["x", "y"]).unwrap();
        assert_eq!(f.ops, vec![Op::Var(1), Op::BinC(Bin::Add, 1.0)]);
        assert_eq!(f.eval(&[5.0, 6.0]), 7.0);
        let f = Formula::parse("if(z, x, y)", &["x", "y", "z"]).unwrap();
        assert_eq!(f.used_vars(), vec![0, 1, 2]);
        // `^2` with a constant exponent squares; a computed right operand stays on the stack.
        let f = Formula::parse("(x+1)^2 - y/(x*y)", &["x", "y"]).unwrap();
        assert_eq!(
            f.ops,
            vec![
                Op::Var(0),
                Op::BinC(Bin::Add, 1.0),
                Op::Square,
                Op::Var(1),
                Op::Var(0),
                Op::BinV(Bin::Mul, 1),
                Op::Bin(Bin::Div),
                Op::Bin(Bin::Sub),
            ]
        );
        assert_eq!(f.eval(&[2.0, 3.0]), 9.0 - 0.5);
        // Every fused form agrees with the stack form (exact identity: same f64 operation).
        for op in ["+", "-", "*", "/", "^", "<", "<=", ">", ">=", "==", "!="] {
            let vals = [1.7, -0.3];
            let fused_v = ev(&format!("x {op} y"), &["x", "y"], &vals);
            let fused_c = ev(&format!("x {op} -0.3"), &["x"], &vals);
            let stacked = ev(&format!("x {op} (y*1)"), &["x", "y"], &vals);
            let want = Bin::apply(
                match op {
                    "+" => Bin::Add,
                    "-" => Bin::Sub,
                    "*" => Bin::Mul,
                    "/" => Bin::Div,
                    "^" => Bin::Pow,
                    "<" => Bin::Lt,
                    "<=" => Bin::Le,
                    ">" => Bin::Gt,
                    ">=" => Bin::Ge,
                    "==" => Bin::Eq,
                    _ => Bin::Ne,
                },
                1.7,
                -0.3,
            );
            for got in [fused_v, fused_c, stacked] {
                assert_eq!(got.to_bits(), want.to_bits(), "x {op} y");
            }
        }
        // Folding a min chain with a variable in the middle keeps the right value.
        assert_eq!(ev("min(4, x, 2, 3)", &["x"], &[5.0]), 2.0);
        assert_eq!(ev("min(4, x, 2, 3)", &["x"], &[1.0]), 1.0);
    }

    #[test]
    fn eval_rows_matches_eval() {
        // Exact identity: both paths perform the same f64 operations in the same order.
        let vars = ["a", "b", "c"];
        let n = 150; // two full blocks of LANES and a partial one
        let x = ndarray::Array2::from_shape_fn((n, 3), |(r, j)| {
            let t = r as f64 * 0.37 + j as f64 * 1.3;
            (t.sin() * 3.0).round() / 2.0 - 0.25 * j as f64
        });
        let formulas = [
            "10*sin(pi*a*b) + 20*(c-0.5)^2 + 10*a + 5*b",
            "if(a > b, sqrt(a), ln(c)) - min(a, b, 1) + max(c, -a)",
            "logistic(3*a - 2*b) * (a != c) / (b - c)",
            "a^b + atan2(a, b) - tan(c) * cos(a) + exp(-b^2) + abs(c) + tanh(a) + atan(b) + log10(a)",
            "-(a*b - (c/(a + (b - (c*(a + 1)))))) ",
            "pi * e",
            "c",
        ];
        for src in formulas {
            let f = Formula::parse(src, &vars).unwrap();
            let mut out = vec![f64::NAN; n];
            f.eval_rows(x.view(), &mut out);
            for (r, got) in out.iter().enumerate() {
                let row = x.row(r).to_vec();
                let want = f.eval(&row);
                assert!(
                    got.to_bits() == want.to_bits() || (got.is_nan() && want.is_nan()),
                    "{src} at row {r}: {got} vs {want}"
                );
            }
        }
        let f = Formula::parse("a + 1", &vars).unwrap();
        let mut empty: Vec<f64> = Vec::new();
        f.eval_rows(x.slice(ndarray::s![0..0, ..]), &mut empty);
    }

    #[test]
    fn friedman1_matches_closed_form() {
        // Friedman (1991), "Multivariate Adaptive Regression Splines", Annals of Statistics
        // 19:1-67, test function 1: f(x) = 10 sin(pi x1 x2) + 20 (x3 - 1/2)^2 + 10 x4 + 5 x5.
        fn friedman1(x: &[f64; 5]) -> f64 {
            10.0 * (PI * x[0] * x[1]).sin()
                + 20.0 * (x[2] - 0.5) * (x[2] - 0.5)
                + 10.0 * x[3]
                + 5.0 * x[4]
        }
        let vars = ["x1", "x2", "x3", "x4", "x5"];
        let f = Formula::parse("10*sin(pi*x1*x2) + 20*(x3-0.5)^2 + 10*x4 + 5*x5", &vars).unwrap();
        assert_eq!(f.used_vars(), vec![0, 1, 2, 3, 4]);
        let points = [
            [0.0, 0.0, 0.0, 0.0, 0.0],
            [0.5, 0.5, 0.5, 0.5, 0.5],
            [1.0, 1.0, 1.0, 1.0, 1.0],
            [0.1, 0.9, 0.3, 0.7, 0.2],
            [0.73, 0.41, 0.05, 0.88, 0.64],
        ];
        for p in &points {
            // Only rounding differs ((x3-0.5)^2 via powf vs a product): values are O(30).
            assert!((f.eval(p) - friedman1(p)).abs() < 1e-12, "{p:?}");
        }
        // Hand values (exact identity): at 0 -> 20*0.25 = 5; at all-ones -> 0 + 5 + 10 + 5 = 20.
        assert!((f.eval(&points[0]) - 5.0).abs() < 1e-12);
        assert!((f.eval(&points[2]) - 20.0).abs() < 1e-12);
    }
}
