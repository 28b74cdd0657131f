//! Dimensions and shapes: a dim is a known size, a named symbol, or unknown.

use super::terms::Terms;
use super::Name;

#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Dim {
    Known(u64),
    /// A symbolic size: a name from the file (`batch`), or an expression over such names
    /// (`batch*3`), or a data-dependent size that tilecut names after its node.
    Sym(Name),
    Unknown,
}

impl Dim {
    pub fn sym(s: &str) -> Dim {
        Dim::Sym(Name::from(s))
    }

    pub fn known(&self) -> Option<u64> {
        match self {
            Dim::Known(v) => Some(*v),
            _ => None,
        }
    }

    /// A `dim_param` as the file writes it. Exporters write sums and products of symbols
    /// with spaces (`past_sequence_length + 1`); those take the compact form tilecut builds
    /// its own expressions in (`past_sequence_length+1`), so that the symbols inside are
    /// known and `--dim` can fix them. Any other text is one opaque symbol, as written.
    pub fn param(text: &str) -> Dim {
        if text.contains(char::is_whitespace) {
            if let Some(compact) = compact_expression(text) {
                return Dim::Sym(Name::from(compact));
            }
        }
        Dim::sym(text)
    }

    /// The symbol names the dim depends on (identifiers in its expression). A text with
    /// spaces in it is not an expression tilecut wrote (see `param`): one symbol, whole.
    pub fn symbols(&self) -> Vec<String> {
        match self {
            Dim::Sym(s) if s.contains(char::is_whitespace) => vec![s.to_string()],
            Dim::Sym(s) => tokens(s)
                // A data-dependent size is named after its node (`k@/model/TopK`), and node
                // names have slashes: only elsewhere is `/` the division tilecut writes.
                .map(|t| if t.contains('@') { t } else { strip_constant_tail(t) })
                .filter(|t| !t.is_empty() && t.parse::<u64>().is_err())
                .map(str::to_string)
                .collect(),
            _ => Vec::new(),
        }
    }

    fn text(&self) -> Option<String> {
        match self {
            Dim::Known(v) => Some(v.to_string()),
            Dim::Sym(s) => Some(s.to_string()),
            Dim::Unknown => None,
        }
    }

    fn wrap(&self) -> Option<String> {
        match self {
            // Division binds like a product but is not associative with one: `3*(T/2)`.
            Dim::Sym(s) if s.contains(['+', '-', '/', '%']) => Some(format!("({s})")),
            _ => self.text(),
        }
    }

    /// Product; known × known is checked (None on overflow, which callers report).
    pub fn mul(&self, other: &Dim) -> Option<Dim> {
        Some(match (self, other) {
            (Dim::Known(a), Dim::Known(b)) => Dim::Known(a.checked_mul(*b)?),
            (Dim::Known(1), d) | (d, Dim::Known(1)) => d.clone(),
            (Dim::Known(0), _) | (_, Dim::Known(0)) => Dim::Known(0),
            (Dim::Unknown, _) | (_, Dim::Unknown) => Dim::Unknown,
            // The symbol first, the number last (`H*4`, never `4*H`), so that products read
            // one way and the short forms (`scaled_product`, `divided_product`) apply.
            (Dim::Sym(s), Dim::Known(k)) | (Dim::Known(k), Dim::Sym(s)) => {
                scaled_product(s, *k).unwrap_or_else(|| Dim::expression(&Dim::Sym(s.clone()), '*', &Dim::Known(*k)))
            }
            (a, b) => Dim::expression(a, '*', b),
        })
    }

    /// `a op b` as a symbolic dim, or unknown past `MAX_EXPRESSION` characters: an expression
    /// that doubles at each step (`x + x`, repeated by a chain of nodes) would otherwise grow
    /// without bound on a hostile or merely odd graph.
    fn expression(a: &Dim, op: char, b: &Dim) -> Dim {
        // A sum needs no parentheses around its terms (everything else binds tighter).
        let (x, y) = if op == '+' {
            (a.text(), b.text())
        } else {
            (a.wrap(), b.wrap())
        };
        match (x, y) {
            (Some(x), Some(y)) if x.len() + y.len() < MAX_EXPRESSION => Dim::sym(&format!("{x}{op}{y}")),
            _ => Dim::Unknown,
        }
    }

    /// The dim plus a constant, which may be negative: `T+2`, `T-1`. A constant ending a
    /// sum joins it (`T+2` less 3 is `T-1`). A size that would go below zero, or a
    /// data-dependent one (`…@node`, whose node name may hold `-`), is unknown.
    pub fn offset(&self, delta: i64) -> Dim {
        match self {
            _ if delta == 0 => self.clone(),
            Dim::Known(a) => i64::try_from(*a)
                .ok()
                .and_then(|a| a.checked_add(delta))
                .and_then(|v| u64::try_from(v).ok())
                .map_or(Dim::Unknown, Dim::Known),
            Dim::Sym(s) if s.contains('@') => Dim::Unknown,
            Dim::Sym(s) => {
                // `rest±k` with k a trailing whole number: a top-level term, since anything
                // inside parentheses would be followed by `)`.
                let tail = s
                    .rfind(['+', '-'])
                    .filter(|&i| i > 0)
                    .and_then(|i| Some((i, s[i + 1..].parse::<u64>().ok()?)));
                let (rest, base) = match tail {
                    Some((i, k)) => {
                        let Ok(k) = i64::try_from(k) else { return Dim::Unknown };
                        (&s[..i], if s.as_bytes()[i] == b'-' { -k } else { k })
                    }
                    None => (&s[..], 0),
                };
                let Some(net) = base.checked_add(delta) else {
                    return Dim::Unknown;
                };
                let text = match net {
                    0 => rest.to_string(),
                    n if n > 0 => format!("{rest}+{n}"),
                    n => format!("{rest}-{}", n.unsigned_abs()),
                };
                if text.len() < MAX_EXPRESSION {
                    Dim::sym(&text)
                } else {
                    Dim::Unknown
                }
            }
            Dim::Unknown => Dim::Unknown,
        }
    }

    /// Whole-number division rounding down, by a positive constant: the size of a strided
    /// window's output. A data-dependent size (named `…@node`) is not divided: node names
    /// may hold slashes, so the expression would not read back.
    pub fn div_floor(&self, divisor: u64) -> Dim {
        match self {
            _ if divisor == 0 => Dim::Unknown,
            Dim::Known(a) => Dim::Known(a / divisor),
            d if divisor == 1 => d.clone(),
            Dim::Sym(s) if s.contains('@') => Dim::Unknown,
            Dim::Sym(s) => match nested_quotient(s, divisor).or_else(|| divided_product(s, divisor)) {
                Some(d) => d,
                None => Dim::expression(self, '/', &Dim::Known(divisor)),
            },
            Dim::Unknown => Dim::Unknown,
        }
    }

    /// The smaller of two sizes: `min(T,512)` for the first T rows of a 512-row table, or
    /// for the `Min` of a length and a cap that exporters write for a TopK's k. `None` where
    /// it cannot be written as an expression `evaluate` reads back (an unknown side, a
    /// data-dependent size, whose node name may hold any character, or a name with spaces).
    #[inline(never)]
    pub fn lesser(&self, other: &Dim) -> Option<Dim> {
        Some(match (self, other) {
            (Dim::Known(a), Dim::Known(b)) => Dim::Known(*a.min(b)),
            (Dim::Known(0), _) | (_, Dim::Known(0)) => Dim::Known(0),
            (Dim::Unknown, _) | (_, Dim::Unknown) => return None,
            (a, b) if a == b => a.clone(),
            (d @ Dim::Sym(s), Dim::Known(k)) | (Dim::Known(k), d @ Dim::Sym(s)) => {
                // A sum of sizes with a constant of at least k is at least k.
                if covers(d, &Dim::Known(*k)) {
                    return Some(Dim::Known(*k));
                }
                // A cap of a cap is one cap: min(min(x, a), k) = min(x, min(a, k)).
                match min_sides(s) {
                    Some((_, a)) if a.parse::<u64>().is_ok_and(|a| a <= *k) => Dim::Sym(s.clone()),
                    Some((x, a)) if a.parse::<u64>().is_ok() => readable(&format!("min({x},{k})"))?,
                    _ => readable(&format!("min({s},{k})"))?,
                }
            }
            (a @ Dim::Sym(x), b @ Dim::Sym(y)) => match (covers(a, b), covers(b, a)) {
                (true, _) => b.clone(),
                (_, true) => a.clone(),
                _ => readable(&format!("min({x},{y})"))?,
            },
        })
    }

    /// Whether broadcasting `x` against this dim gives `x`: this is `min(x,k)` for a known
    /// k ≥ 1. Broadcasting x with min(x, k) is valid only where the two are equal or one of
    /// them is 1, and in each case the result is x (min(x, k) = 1 < x needs k = 1, and
    /// x = 1 makes min(1, k) = 1 for k ≥ 1). Positions sliced to the length and added to the
    /// sequence keep its length this way.
    #[inline(never)]
    pub fn caps(&self, x: &Dim) -> bool {
        let (Dim::Sym(s), Dim::Sym(x)) = (self, x) else {
            return false;
        };
        min_sides(s).is_some_and(|(a, b)| {
            let at_least_one = |t: &str| t.parse::<u64>().is_ok_and(|k| k >= 1);
            (a == &**x && at_least_one(b)) || (b == &**x && at_least_one(a))
        })
    }

    /// Whether this size is never 1, whatever its symbols: a known size other than 1, or a
    /// product with a whole-number factor of 2 or more (`(H+31)/32*2`, what a ×2 upsampling
    /// gives). Broadcasting such a dim against any other gives it back: the other must equal
    /// it or be 1 for the model to be valid, and both give this one. Feature pyramids add an
    /// upsampled map to a finer one whose size is written differently (`(H+15)/16`).
    #[inline(never)]
    pub fn never_one(&self) -> bool {
        match self {
            Dim::Known(v) => *v != 1,
            Dim::Sym(s) => {
                let s = unwrapped(s);
                if s.contains('@') || has_top_level(s, b"+-/%,") {
                    return false;
                }
                let mut factors = Vec::new();
                let mut from = 0;
                for (i, (b, depth)) in depths(s).enumerate() {
                    if b == b'*' && depth == 0 {
                        factors.push(&s[from..i]);
                        from = i + 1;
                    }
                }
                factors.push(&s[from..]);
                factors.len() > 1 && factors.iter().any(|f| f.parse::<u64>().is_ok_and(|k| k >= 2))
            }
            Dim::Unknown => false,
        }
    }

    /// Difference by a known amount (`T-1`); a size less another unknown one is not
    /// expressed (it could be anything, negative included).
    pub fn less_known(&self, other: &Dim) -> Option<Dim> {
        let k = i64::try_from(other.known()?).ok()?;
        Some(self.offset(-k))
    }

    pub fn add(&self, other: &Dim) -> Option<Dim> {
        Some(match (self, other) {
            (Dim::Known(a), Dim::Known(b)) => Dim::Known(a.checked_add(*b)?),
            (Dim::Known(0), d) | (d, Dim::Known(0)) => d.clone(),
            (Dim::Unknown, _) | (_, Dim::Unknown) => Dim::Unknown,
            (d @ Dim::Sym(_), Dim::Known(k)) | (Dim::Known(k), d @ Dim::Sym(_)) => match i64::try_from(*k) {
                Ok(k) => d.offset(k),
                Err(_) => Dim::Unknown,
            },
            (a, b) => collected_sum(a, b).unwrap_or_else(|| Dim::expression(a, '+', b)),
        })
    }

    /// Difference of two sizes, as a value that shape arithmetic computes (`K - Q`, `k - x%k`):
    /// terms that cancel are taken out (`P+S` less `S` is `P`); what stays is written
    /// `a-(b)`. Less a known amount it is `offset` (`T-2`, or an unknown dim below zero).
    /// `None` where a symbolic side is unknown or data-dependent, or the difference is below
    /// zero whatever the symbols.
    pub fn sub(&self, other: &Dim) -> Option<Dim> {
        match (self, other) {
            (_, Dim::Known(_)) => self.less_known(other),
            (a, b) if a == b => Some(Dim::Known(0)),
            (a, b) => difference(a, b),
        }
    }

    /// Remainder of a size by a positive whole number (`x%k`; for sizes, which are never
    /// negative, ONNX Mod's two sign rules agree). A product with a factor that k divides is
    /// 0. `None` where it cannot be written back (an unknown or data-dependent size).
    #[inline(never)]
    pub fn modulo(&self, k: u64) -> Option<Dim> {
        match self {
            _ if k == 0 => None,
            Dim::Known(a) => Some(Dim::Known(a % k)),
            _ if k == 1 => Some(Dim::Known(0)),
            Dim::Sym(s) if s.contains('@') => None,
            Dim::Sym(s) => {
                let s = unwrapped(s);
                if !has_top_level(s, b"+-/%") && s.split('*').any(|f| f.parse::<u64>().is_ok_and(|f| f % k == 0)) {
                    return Some(Dim::Known(0));
                }
                if has_top_level(s, b"+-*/%") {
                    readable(&format!("({s})%{k}"))
                } else {
                    readable(&format!("{s}%{k}"))
                }
            }
            Dim::Unknown => None,
        }
    }
}

impl std::fmt::Display for Dim {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Dim::Known(v) => write!(f, "{v}"),
            Dim::Sym(s) => f.write_str(s),
            Dim::Unknown => f.write_str("?"),
        }
    }
}

/// `a + b` for two symbolic sizes with terms in common or a whole-number identity between them
/// (`Terms::tidy`), written with like terms collected; `None` for a plain sum, which stays as
/// written (`P+S`).
#[inline(never)]
fn collected_sum(a: &Dim, b: &Dim) -> Option<Dim> {
    let (ta, tb) = (Terms::of(a)?, Terms::of(b)?);
    let shared = ta.shares_a_term(&tb);
    let sum = ta.plus(&tb, 1)?;
    let tidy = sum.clone().tidy()?;
    (shared || tidy != sum).then(|| tidy.render()).flatten()
}

#[inline(never)]
fn difference(a: &Dim, b: &Dim) -> Option<Dim> {
    Terms::of(a)?.plus(&Terms::of(b)?, -1)?.tidy()?.render()
}

/// Whether `big` is at least `small` for every value of their symbols: their difference is a
/// sum of sizes, or one is the other rounded to a multiple of k, `big` up (`((x+k-1)/k)*k`)
/// or `small` down (`(x/k)*k`).
fn covers(big: &Dim, small: &Dim) -> bool {
    if let (Some(b), Some(s)) = (Terms::of(big), Terms::of(small)) {
        if b.plus(&s, -1).is_some_and(|d| d.nonnegative()) {
            return true;
        }
    }
    let factor = |d: &Dim| match d {
        Dim::Sym(text) => text
            .rsplit_once('*')
            .and_then(|(_, k)| k.parse::<u64>().ok())
            .filter(|&k| k > 0),
        _ => None,
    };
    let up = factor(big).is_some_and(|k| {
        let padded = i64::try_from(k - 1)
            .ok()
            .and_then(|up| small.offset(up).div_floor(k).mul(&Dim::Known(k)));
        padded.as_ref() == Some(big)
    });
    up || factor(small).is_some_and(|k| big.div_floor(k).mul(&Dim::Known(k)).as_ref() == Some(small))
}

/// The longest symbolic dim expression tilecut builds; longer ones become unknown.
pub const MAX_EXPRESSION: usize = 256;

/// The most dims a shape may have. A file declaring more is refused, and an op whose output
/// would have more (a Reshape to a shape tensor declared with 2^31 values) fails with a reason:
/// a rank is an allocation, and a hostile file could otherwise ask for gigabytes per tensor.
/// 64 is numpy's limit since numpy 2 (32 before; from memory), the arrays the `onnx` package's
/// reference evaluator computes with, so no model that evaluator runs has more.
pub const MAX_RANK: usize = 64;

/// `len` as a rank, or why it cannot be one.
pub fn rank_within_limit(len: u64) -> Result<usize, String> {
    usize::try_from(len)
        .ok()
        .filter(|&r| r <= MAX_RANK)
        .ok_or_else(|| format!("a shape of {len} dims is beyond tilecut's limit of {MAX_RANK}"))
}

/// Each byte of `s` with the parenthesis depth after it.
pub(super) fn depths(s: &str) -> impl Iterator<Item = (u8, i32)> + '_ {
    s.bytes().scan(0i32, |depth, b| {
        match b {
            b'(' => *depth += 1,
            b')' => *depth -= 1,
            _ => {}
        }
        Some((b, *depth))
    })
}

/// Whether `s` has one of `ops` outside every pair of parentheses.
pub(super) fn has_top_level(s: &str, ops: &[u8]) -> bool {
    depths(s).any(|(b, depth)| depth == 0 && ops.contains(&b))
}

/// `s` without one pair of parentheses around all of it, if it has one.
pub(super) fn unwrapped(s: &str) -> &str {
    match s.strip_prefix('(').and_then(|r| r.strip_suffix(')')) {
        // `(a)*(b)` also starts and ends with parentheses: only a pair that never closes
        // early encloses the whole.
        Some(inner) if balanced(inner) => inner,
        _ => s,
    }
}

pub(super) fn balanced(s: &str) -> bool {
    depths(s).all(|(_, depth)| depth >= 0) && depths(s).last().is_none_or(|(_, d)| d == 0)
}

/// `x*a` times `k` as `x*(a·k)`, for a product `s` whose last factor is a whole number: a
/// grid upsampled twice by 2 reads `x*4`, not `(x*2)*2`. Only a plain product is merged (no
/// sum or quotient at its top level), since `a+b*2` times 2 is not `a+b*4`.
fn scaled_product(s: &str, k: u64) -> Option<Dim> {
    let s = unwrapped(s);
    // A data-dependent size's node name may hold any character: never taken apart.
    if s.contains('@') || has_top_level(s, b"+-/%") {
        return None;
    }
    let (rest, a) = s.rsplit_once('*')?;
    let a: u64 = a.parse().ok()?;
    let text = format!("{rest}*{}", a.checked_mul(k)?);
    (text.len() < MAX_EXPRESSION).then(|| Dim::sym(&text))
}

/// `(x/b + a) / d` as `(x + a·b) / (b·d)`: for whole numbers, floor(floor(x/b) + a) / d)
/// equals floor((x + a·b) / (b·d)) (common practice: nested floor division). A stack of
/// stride-2 windows then reads `(width+31)/32`, not five nested quotients. `s` must be a
/// quotient of a parenthesized expression or a name by a whole number, with an optional
/// whole-number term after it.
fn nested_quotient(s: &str, d: u64) -> Option<Dim> {
    let s = unwrapped(s);
    // The trailing `±a`, a top-level term when the text after the sign is a plain number.
    let (q, a) = match s.rfind(['+', '-']) {
        Some(i) if i > 0 && s[i + 1..].bytes().all(|c| c.is_ascii_digit()) && i + 1 < s.len() => {
            let a: i64 = s[i + 1..].parse().ok()?;
            (&s[..i], if s.as_bytes()[i] == b'-' { -a } else { a })
        }
        _ => (s, 0),
    };
    let (x, b) = q.rsplit_once('/')?;
    let b: u64 = b.parse().ok()?;
    let x = match x.strip_prefix('(').and_then(|r| r.strip_suffix(')')) {
        Some(inner) if balanced(inner) => inner,
        // A bare name: anything with an operator in it would bind differently.
        _ if !x.is_empty() && !x.contains(['+', '-', '*', '/', '%', '(', ')']) => x,
        _ => return None,
    };
    let shift = a.checked_mul(i64::try_from(b).ok()?)?;
    let inner = Dim::sym(x).offset(shift);
    if inner == Dim::Unknown {
        return None;
    }
    Some(Dim::expression(&inner, '/', &Dim::Known(b.checked_mul(d)?)))
}

/// `(x*a + r) / d` as `x*(a/d) + r/d` where d divides a: for whole numbers,
/// floor((a·x + r) / d) = (a/d)·x + floor(r / d) (common practice: a multiple of d divides
/// exactly); as `(x + r/a) / (d/a)` where a divides d and r. A stride-2 window over a map upsampled by 4 then reads `x*2`, not
/// `(x*4+1)/2`, and deep pyramids stay under `MAX_EXPRESSION`. `s` must be a product whose
/// last factor is a whole number, with an optional whole-number term after it.
fn divided_product(s: &str, d: u64) -> Option<Dim> {
    let s = unwrapped(s);
    if s.contains('@') {
        return None;
    }
    let (p, r) = match s.rfind('+') {
        Some(i) if i > 0 && i + 1 < s.len() && s[i + 1..].bytes().all(|c| c.is_ascii_digit()) => {
            (&s[..i], s[i + 1..].parse::<u64>().ok()?)
        }
        _ => (s, 0),
    };
    if has_top_level(p, b"+-/%,") {
        return None;
    }
    let (x, a) = p.rsplit_once('*')?;
    let a: u64 = a.parse().ok()?;
    if a == 0 || x.is_empty() {
        return None;
    }
    let base = Dim::sym(unwrapped(x));
    if a % d != 0 {
        // floor((a·x + r) / d) = floor((x + r/a) / (d/a)) where a divides both d and r:
        // `(H*2)/4` is `H/2`.
        if d % a != 0 || r % a != 0 {
            return None;
        }
        let shifted = base.offset(i64::try_from(r / a).ok()?);
        return (shifted != Dim::Unknown).then(|| shifted.div_floor(d / a));
    }
    let scaled = base.mul(&Dim::Known(a / d))?;
    let shifted = scaled.offset(i64::try_from(r / d).ok()?);
    (shifted != Dim::Unknown).then_some(shifted)
}

/// `text` without its spaces, if it is a sum of products of identifiers and whole numbers
/// (with parentheses) that uses at least one operator.
pub fn compact_expression(text: &str) -> Option<String> {
    // `//` is how exporters that print Python expressions write the floor division tilecut
    // writes as `/` (the same for sizes, which are never negative).
    let compact: String = text.split_whitespace().collect::<String>().replace("//", "/");
    let operators = compact.contains(['+', '*', '-', '/', '%']);
    (operators && evaluate(&compact, &|_| Some(1)).is_ok()).then_some(compact)
}

/// The two sides of `min(a,b)` as tilecut writes it (the whole text one call).
pub(super) fn min_sides(s: &str) -> Option<(&str, &str)> {
    let inner = s.strip_prefix("min(")?.strip_suffix(')')?;
    let mut depth = 0i32;
    let mut comma = None;
    for (i, b) in inner.bytes().enumerate() {
        match b {
            b'(' => depth += 1,
            b')' => depth -= 1,
            b',' if depth == 0 => {
                if comma.is_some() {
                    return None;
                }
                comma = Some(i);
            }
            _ => {}
        }
        if depth < 0 {
            return None;
        }
    }
    let i = comma.filter(|_| depth == 0)?;
    Some((&inner[..i], &inner[i + 1..]))
}

/// `text` as a dim if `evaluate` reads it back and it is not too long.
fn readable(text: &str) -> Option<Dim> {
    (text.len() < MAX_EXPRESSION && evaluate(text, &|_| Some(1)).is_ok()).then(|| Dim::sym(text))
}

/// The operands of an expression: the text between operators, parentheses and commas, less
/// the name of a `min(` call.
fn tokens(s: &str) -> impl Iterator<Item = &str> {
    let mut rest = s;
    std::iter::from_fn(move || loop {
        if rest.is_empty() {
            return None;
        }
        let end = rest.find(['*', '+', '(', ')', ',']).unwrap_or(rest.len());
        let (t, after) = rest.split_at(end);
        let call = t == "min" && after.starts_with('(');
        rest = after.get(1..).unwrap_or("");
        if !call {
            // `a-(b)`: the dash before a parenthesis takes away; it is no part of `a`.
            return Some(match after.starts_with('(') {
                true => t.strip_suffix('-').unwrap_or(t),
                false => t,
            });
        }
    })
}

/// A token of an expression without its trailing `-k`, `/k` or `%k` (whole numbers): `T-1`
/// is `T`, `T/2` is `T`, `seq-len-2` is `seq-len`; `seq-len` and `N/A` are names and stay
/// whole.
fn strip_constant_tail(mut t: &str) -> &str {
    while let Some(i) = t.rfind(['-', '/', '%']) {
        let k = &t[i + 1..];
        if k.is_empty() || !k.bytes().all(|c| c.is_ascii_digit()) {
            break;
        }
        t = &t[..i];
    }
    t
}

/// The text given to `evaluate` is not a sum of products.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct NotAnExpression;

/// Evaluates a sum of products and quotients over identifiers, whole numbers and `min(x,y)`
/// (`a+2*(b+1)/3`, `k-(x%k)`, no spaces; `/` rounds down, `%` is the remainder; left to right
/// within a product and within a sum). `Err` if the
/// text is not such an expression; `Ok(None)` if `value` does not know an identifier, the
/// arithmetic overflows or divides by zero.
pub fn evaluate(text: &str, value: &dyn Fn(&str) -> Option<u64>) -> Result<Option<u64>, NotAnExpression> {
    /// An operator's character and its checked arithmetic.
    type Operator = (u8, fn(u64, u64) -> Option<u64>);
    struct P<'a> {
        s: &'a [u8],
        at: usize,
        value: &'a dyn Fn(&str) -> Option<u64>,
    }
    impl P<'_> {
        fn peek(&self) -> Option<u8> {
            self.s.get(self.at).copied()
        }
        /// One precedence level: operands joined by `join` (any operand) or `by_number` (a
        /// whole number only, what tilecut writes: see `offset` and `div_floor`).
        /// One precedence level: operands joined by `join` (any operand) or by one of
        /// `by_number`, whose right side is a whole number or, for `-`, a parenthesized
        /// expression (what tilecut writes: see `offset`, `div_floor`, `modulo`, `sub`; a
        /// name after `-` would be read into names like `seq-len`).
        fn chain(
            &mut self,
            depth: usize,
            (join, join_op): Operator,
            by_number: &[Operator],
            operand: fn(&mut Self, usize) -> Result<Option<u64>, NotAnExpression>,
        ) -> Result<Option<u64>, NotAnExpression> {
            let mut acc = operand(self, depth)?;
            while let Some(op) = self.peek().filter(|&c| c == join || by_number.iter().any(|o| o.0 == c)) {
                self.at += 1;
                let next_ok = |c: u8| c.is_ascii_digit() || (op == b'-' && c == b'(');
                if op != join && !self.peek().is_some_and(next_ok) {
                    return Err(NotAnExpression);
                }
                let r = operand(self, depth)?;
                // Overflow, a size below zero or a division by zero: unknown.
                let f = match by_number.iter().find(|o| o.0 == op) {
                    Some(o) if op != join => o.1,
                    _ => join_op,
                };
                acc = acc.zip(r).and_then(|(a, b)| f(a, b));
            }
            Ok(acc)
        }
        fn sum(&mut self, depth: usize) -> Result<Option<u64>, NotAnExpression> {
            self.chain(
                depth,
                (b'+', u64::checked_add),
                &[(b'-', u64::checked_sub)],
                Self::product,
            )
        }
        fn product(&mut self, depth: usize) -> Result<Option<u64>, NotAnExpression> {
            self.chain(
                depth,
                (b'*', u64::checked_mul),
                &[(b'/', u64::checked_div), (b'%', u64::checked_rem)],
                Self::factor,
            )
        }
        fn factor(&mut self, depth: usize) -> Result<Option<u64>, NotAnExpression> {
            // Dims come from files: a hostile one must not nest parentheses into a stack overflow.
            if depth > 64 {
                return Err(NotAnExpression);
            }
            match self.peek() {
                Some(b'(') => {
                    self.at += 1;
                    let v = self.sum(depth + 1)?;
                    if self.peek() != Some(b')') {
                        return Err(NotAnExpression);
                    }
                    self.at += 1;
                    Ok(v)
                }
                Some(c) if c.is_ascii_digit() => {
                    let start = self.at;
                    while self.peek().is_some_and(|c| c.is_ascii_digit()) {
                        self.at += 1;
                    }
                    let digits = std::str::from_utf8(&self.s[start..self.at]).map_err(|_| NotAnExpression)?;
                    Ok(digits.parse().ok())
                }
                Some(c) if c.is_ascii_alphabetic() || c == b'_' => {
                    let start = self.at;
                    // Exporters put dots in dim names (`p2o.DynamicDimension.1`); a dot is no
                    // operator here, so it belongs to the name.
                    while self
                        .peek()
                        .is_some_and(|c| c.is_ascii_alphanumeric() || c == b'_' || c == b'.')
                    {
                        self.at += 1;
                    }
                    let name = std::str::from_utf8(&self.s[start..self.at]).map_err(|_| NotAnExpression)?;
                    if name == "min" && self.peek() == Some(b'(') {
                        self.at += 1;
                        let a = self.sum(depth + 1)?;
                        if self.peek() != Some(b',') {
                            return Err(NotAnExpression);
                        }
                        self.at += 1;
                        let b = self.sum(depth + 1)?;
                        if self.peek() != Some(b')') {
                            return Err(NotAnExpression);
                        }
                        self.at += 1;
                        return Ok(a.zip(b).map(|(a, b)| a.min(b)));
                    }
                    Ok((self.value)(name))
                }
                _ => Err(NotAnExpression),
            }
        }
    }
    let mut p = P {
        s: text.as_bytes(),
        at: 0,
        value,
    };
    let v = p.sum(0)?;
    if p.at != text.len() {
        return Err(NotAnExpression);
    }
    Ok(v)
}

/// Dims gathered on the stack before they become a `Shape` (`Shape::of`): ranks above
/// six are rare enough to spill.
pub type DimVec = smallvec::SmallVec<[Dim; 6]>;

/// Most distinct dim lists a thread keeps for sharing; past it the table starts again (the
/// shapes already made keep their allocations), so that a model of ever new shapes, or a
/// process reading many models, holds no more than this many.
const SHARED_DIMS_MAX: usize = 4096;

/// One allocation per distinct dim list made on the calling thread. Each output shape was an
/// allocation of its own (64 bytes for a rank-3 shape): 75,000 of them, 5.6 MB, on the
/// 100k-node stack, which has 9 distinct shapes. Shared, its inference takes about 1.5 of
/// 24.5 ms less and a whole `inspect` peaks 1 MB lower; most of the memory saved was memory
/// import had freed (README, "Twenty-fourth session"). Looked up by content: `Known` by value,
/// `Sym` by its interned text's address (equal texts share one), so no text is hashed.
fn shared_dims(dims: &[Dim]) -> std::sync::Arc<[Dim]> {
    use std::cell::RefCell;
    use std::hash::Hasher;
    use std::sync::Arc;
    thread_local!(static TABLE: RefCell<hashbrown::HashTable<Arc<[Dim]>>> = const { RefCell::new(hashbrown::HashTable::new()) });
    fn hash(dims: &[Dim]) -> u64 {
        let mut h = crate::fastmap::FxHasher::default();
        h.write_usize(dims.len());
        for d in dims {
            match d {
                Dim::Known(v) => {
                    // One word, not the byte path `write_u64` takes; a size past a 32-bit
                    // `usize` hashes its low bits, which equality then tells apart.
                    h.write_u8(0);
                    h.write_usize(*v as usize);
                }
                Dim::Sym(s) => {
                    h.write_u8(1);
                    h.write_usize(s.addr());
                }
                Dim::Unknown => h.write_u8(2),
            }
        }
        h.finish()
    }
    let h = hash(dims);
    // A thread whose table is gone (its exit under way) or in use makes its own allocation.
    let found = TABLE.try_with(|t| {
        let mut t = t.try_borrow_mut().ok()?;
        if let Some(a) = t.find(h, |a| **a == *dims) {
            return Some(a.clone());
        }
        if t.len() >= SHARED_DIMS_MAX {
            t.clear();
        }
        let a: Arc<[Dim]> = dims.into();
        t.insert_unique(h, a.clone(), |a| hash(a));
        Some(a)
    });
    found.ok().flatten().unwrap_or_else(|| dims.into())
}

/// A shape: `None` when even the rank is unknown. A shared slice (16 bytes, not a vector's
/// 24): every value's fact holds one, shapes are made whole, never grown in place, and most
/// ops of a model (activations, normalizations, element-wise ops on equal shapes, Q/DQ
/// pairs) give their output the shape of an input, which is then the same allocation.
#[derive(Clone, Debug, PartialEq, Eq, Hash)]
pub struct Shape(pub Option<std::sync::Arc<[Dim]>>);

impl Shape {
    pub fn unknown() -> Shape {
        Shape(None)
    }

    pub fn known(dims: &[u64]) -> Shape {
        Shape(Some(dims.iter().map(|&d| Dim::Known(d)).collect()))
    }

    /// A shape of these dims. Equal dims made on one thread share one allocation (see
    /// `shared_dims`): a 100k-node stack makes 75,000 output shapes of 9 distinct contents.
    pub fn of(dims: impl AsRef<[Dim]>) -> Shape {
        Shape(Some(shared_dims(dims.as_ref())))
    }

    /// Whether two shapes are one allocation (a cheap "equal" for shapes passed on).
    pub fn same_alloc(&self, other: &Shape) -> bool {
        match (&self.0, &other.0) {
            (Some(a), Some(b)) => std::sync::Arc::ptr_eq(a, b),
            _ => false,
        }
    }

    pub fn scalar() -> Shape {
        Shape(Some(std::sync::Arc::new([])))
    }

    /// Unknown dims of a known rank.
    pub fn of_rank(rank: usize) -> Shape {
        Shape(Some(std::iter::repeat_n(Dim::Unknown, rank).collect()))
    }

    pub fn dims(&self) -> Option<&[Dim]> {
        self.0.as_deref()
    }

    pub fn rank(&self) -> Option<usize> {
        self.0.as_ref().map(|d| d.len())
    }

    /// Every dim as a number, if all are known.
    pub fn concrete(&self) -> Option<Vec<u64>> {
        self.0.as_ref()?.iter().map(Dim::known).collect()
    }

    pub fn is_concrete(&self) -> bool {
        self.0
            .as_ref()
            .is_some_and(|d| d.iter().all(|x| matches!(x, Dim::Known(_))))
    }

    /// Element count; `None` if any dim is not known or the product overflows.
    pub fn element_count(&self) -> Option<u64> {
        self.0
            .as_ref()?
            .iter()
            .try_fold(1u64, |acc, d| acc.checked_mul(d.known()?))
    }

    /// Adds the symbols that keep this shape from being concrete to `out`, skipping those
    /// already there (a shared `Name`, no allocation: large graphs repeat one `batch`).
    pub fn symbols_into(&self, out: &mut super::NameList) {
        for d in self.dims().unwrap_or_default() {
            let Dim::Sym(s) = d else { continue };
            // Dims copied from one another share their text: most repeats end here, before
            // any scan of the text.
            if out.iter().any(|x| x.addr() == s.addr()) {
                continue;
            }
            // The last plain symbol met on this thread: a graph with a symbolic batch asks
            // this of every node's tensors, and one address compare spares scanning its text.
            thread_local!(static LAST_PLAIN: std::cell::Cell<usize> = const { std::cell::Cell::new(0) });
            if LAST_PLAIN.get() == s.addr() {
                out.push(s.clone());
                continue;
            }
            // A dash may be a name's own (`seq-len`) or take away (`T-2`): not simple.
            let simple = !s.contains(['*', '+', '(', ')', '/', '-', '%']);
            if simple {
                // Interned: a name equal to one in `out` would have matched its address above.
                if s.parse::<u64>().is_err() {
                    LAST_PLAIN.set(s.addr());
                    out.push(s.clone());
                }
            } else {
                for t in d.symbols() {
                    if !out.iter().any(|x| *x == t) {
                        out.push(Name::from(t));
                    }
                }
            }
        }
    }

    /// Symbols that keep this shape from being concrete.
    pub fn symbols(&self) -> Vec<String> {
        let mut out: Vec<String> = self.dims().unwrap_or_default().iter().flat_map(Dim::symbols).collect();
        out.sort();
        out.dedup();
        out
    }
}

impl std::fmt::Display for Shape {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.0 {
            None => f.write_str("?"),
            Some(d) => {
                f.write_str("[")?;
                for (i, x) in d.iter().enumerate() {
                    if i > 0 {
                        f.write_str(",")?;
                    }
                    write!(f, "{x}")?;
                }
                f.write_str("]")
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Merged quotients and products must equal the step-by-step integer arithmetic at every
    /// size (floor division of whole numbers, common practice), and stay short.
    #[test]
    fn merged_quotients_and_products_equal_the_step_by_step_sizes() {
        // Each chain: a stride-s window of kernel k and total padding p, or a scale, or an
        // offset, applied in turn to a symbolic T.
        #[derive(Clone, Copy)]
        enum Step {
            Window { k: u64, s: u64, p: u64 },
            Scale(u64),
            Offset(i64),
        }
        use Step::*;
        let chains: &[&[Step]] = &[
            &[Window { k: 3, s: 2, p: 2 }; 5],
            &[
                Window { k: 3, s: 2, p: 2 },
                Window { k: 2, s: 2, p: 0 },
                Scale(2),
                Scale(2),
            ],
            &[
                Window { k: 7, s: 2, p: 6 },
                Window { k: 3, s: 2, p: 2 },
                Scale(3),
                Window { k: 5, s: 3, p: 0 },
            ],
            &[
                Offset(-1),
                Window { k: 4, s: 4, p: 0 },
                Offset(2),
                Window { k: 1, s: 2, p: 0 },
            ],
            // A stride-32 map upsampled by 4, then stride-2 and stride-4 windows over it.
            &[
                Window { k: 1, s: 32, p: 31 },
                Scale(4),
                Window { k: 3, s: 2, p: 2 },
                Window { k: 3, s: 2, p: 2 },
            ],
            &[
                Scale(6),
                Window { k: 5, s: 3, p: 4 },
                Scale(2),
                Window { k: 2, s: 4, p: 3 },
            ],
        ];
        for (c, chain) in chains.iter().enumerate() {
            let mut d = Dim::sym("T");
            for step in chain.iter() {
                d = match step {
                    Window { k, s, p } => d.offset(*p as i64 - *k as i64).div_floor(*s).offset(1),
                    Scale(f) => d.mul(&Dim::Known(*f)).expect("product"),
                    Offset(o) => d.offset(*o),
                };
            }
            let Dim::Sym(text) = &d else { panic!("chain {c}: {d:?}") };
            assert!(text.len() < 40, "chain {c}: `{text}` was not merged");
            for t in 16..300u64 {
                let mut want = t as i64;
                for step in chain.iter() {
                    want = match step {
                        Window { k, s, p } => (want + *p as i64 - *k as i64).div_euclid(*s as i64) + 1,
                        Scale(f) => want * *f as i64,
                        Offset(o) => want + o,
                    };
                }
                let got = evaluate(text, &|n| (n == "T").then_some(t)).expect("expression");
                assert_eq!(got, Some(want as u64), "chain {c} at T = {t}: `{text}`");
            }
        }
        // A product by a multiple of the divisor divides exactly.
        let x = Dim::sym("(h+31)/32");
        let up = x.mul(&Dim::Known(4)).expect("product");
        assert_eq!(up.offset(1).div_floor(2), Dim::sym("((h+31)/32)*2"));
        assert_eq!(up.offset(3).div_floor(4), x);
        assert_eq!(Dim::sym("T*6+7").div_floor(3), Dim::sym("T*2+2"));
        assert_eq!(Dim::sym("T*6+7").div_floor(4), Dim::sym("(T*6+7)/4"));
        // Not merged: a sum times a number, and a quotient of a product.
        assert_eq!(Dim::sym("a+b*2").mul(&Dim::Known(2)), Some(Dim::sym("(a+b*2)*2")));
        assert_eq!(Dim::sym("a*b/2").div_floor(2), Dim::sym("(a*b/2)/2"));
        assert_eq!(Dim::sym("(a)*(b)").mul(&Dim::Known(3)), Some(Dim::sym("(a)*(b)*3")));
    }

    #[test]
    fn file_expressions_become_compact_and_evaluate() {
        // Exporters of decoders with a KV cache write the sequence dim this way (common
        // practice; spelling from memory).
        assert_eq!(
            Dim::param("past_sequence_length + 1"),
            Dim::sym("past_sequence_length+1")
        );
        assert_eq!(Dim::param("2 * (a + b)"), Dim::sym("2*(a+b)"));
        // Python's floor division, as exporters that print Python expressions write a
        // strided size (spelling from memory).
        assert_eq!(Dim::param("(s0 - 1)//2 + 1"), Dim::sym("(s0-1)/2+1"));
        assert_eq!(Dim::param("(s0 - 1)//2 + 1").symbols(), ["s0".to_string()]);
        // Not expressions tilecut reads: kept whole, one symbol each.
        for text in ["batch size", "a - b", "floor(T / 2)", "a + ", "(a + b", "T / n"] {
            assert_eq!(Dim::param(text), Dim::sym(text), "{text}");
            assert_eq!(Dim::param(text).symbols(), [text.to_string()], "{text}");
        }
        assert_eq!(Dim::param("batch"), Dim::sym("batch"));
        assert_eq!(Dim::param("a + 1").symbols(), ["a".to_string()]);
        let v = |x: &str| match x {
            "a" => Some(3),
            "b" => Some(4),
            _ => None,
        };
        assert_eq!(evaluate("2*(a+b)+1", &v), Ok(Some(15)));
        assert_eq!(evaluate("a*c", &v), Ok(None));
        assert_eq!(evaluate("18446744073709551615*2", &v), Ok(None), "overflow is unknown");
        assert_eq!(evaluate("a+", &v), Err(NotAnExpression));
        let dotted = |n: &str| (n == "p2o.DynamicDimension.1").then_some(64);
        assert_eq!(evaluate("((p2o.DynamicDimension.1+1)/2)*8", &dotted), Ok(Some(256)));
        assert_eq!(evaluate("a b", &v), Err(NotAnExpression));
        // A hostile file's parentheses end the parse, not the process.
        let deep = format!("{}1{}", "(".repeat(100_000), ")".repeat(100_000));
        assert_eq!(evaluate(&deep, &v), Err(NotAnExpression));
        assert_eq!(Dim::param(&format!("{deep} + 1")).symbols().len(), 1);
    }

    #[test]
    fn expressions_that_double_stop_growing() {
        let mut d = Dim::sym("n");
        for _ in 0..200 {
            d = d.add(&d).expect("no overflow");
            d = d.mul(&Dim::Known(3)).expect("no overflow");
        }
        assert_eq!(d, Dim::Unknown);
        assert_eq!(Dim::sym("a").add(&Dim::Known(2)), Some(Dim::sym("a+2")));
    }

    #[test]
    fn quotients_round_down_and_keep_their_place() {
        let t = Dim::sym("T");
        let half = t.add(&Dim::Known(1)).expect("sum").div_floor(2);
        assert_eq!(half, Dim::sym("(T+1)/2"));
        assert_eq!(half.symbols(), ["T".to_string()]);
        let tripled = Dim::Known(3).mul(&t.div_floor(2)).expect("product");
        assert_eq!(tripled, Dim::sym("(T/2)*3"));
        for v in [0u64, 1, 2, 7, 100] {
            let at = |x: &str| (x == "T").then_some(v);
            assert_eq!(evaluate("(T+1)/2", &at), Ok(Some(v.div_ceil(2))));
            assert_eq!(evaluate("3*(T/2)", &at), Ok(Some(3 * (v / 2))));
            assert_eq!(evaluate("3*T/2", &at), Ok(Some(3 * v / 2)), "left to right");
        }
        assert_eq!(evaluate("T/0", &|_| Some(4)), Ok(None));
        // A data-dependent size keeps its node's slashes and is not divided.
        let k = Dim::sym("k@/model/TopK");
        assert_eq!(k.symbols(), ["k@/model/TopK".to_string()]);
        assert_eq!(k.div_floor(2), Dim::Unknown);
        assert_eq!(Dim::Known(7).div_floor(2), Dim::Known(3));
        let padded = t.add(&Dim::Known(2)).and_then(|d| d.add(&Dim::Known(1)));
        assert_eq!(padded, Some(Dim::sym("T+3")));
        let sum = Dim::sym("a+b").add(&Dim::sym("c/2+1"));
        assert_eq!(sum, Some(Dim::sym("a+b+c/2+1")));
        assert_eq!(evaluate("a+b+c/2+1", &|_| Some(5)), Ok(Some(5 + 5 + 2 + 1)));
        // Constants subtract: a window that shrinks, a crop; below zero is no size.
        assert_eq!(t.offset(-2), Dim::sym("T-2"));
        assert_eq!(t.offset(-2).offset(5), Dim::sym("T+3"));
        assert_eq!(t.offset(3).offset(-3), t);
        assert_eq!(t.offset(-2).div_floor(2), Dim::sym("(T-2)/2"));
        assert_eq!(t.offset(-2).symbols(), ["T".to_string()]);
        assert_eq!(Dim::Known(1).offset(-2), Dim::Unknown);
        assert_eq!(Dim::sym("k@/a-b").offset(-1), Dim::Unknown);
        for v in [2u64, 3, 10] {
            let at = |x: &str| (x == "T").then_some(v);
            assert_eq!(evaluate("(T-2)/2", &at), Ok(Some((v - 2) / 2)));
        }
        assert_eq!(evaluate("T-2", &|_| Some(1)), Ok(None), "below zero");
        assert_eq!(evaluate("a-b", &|_| Some(1)), Err(NotAnExpression));
        // Names with a dash or a slash in them are names, not differences or quotients.
        assert_eq!(Dim::sym("seq-len").symbols(), ["seq-len".to_string()]);
        // A file's name with a slash in it is a name, not a quotient.
        assert_eq!(Dim::sym("N/A").symbols(), ["N/A".to_string()]);
        assert_eq!(evaluate("N/A", &|_| Some(4)), Err(NotAnExpression));
    }

    /// Capped sizes (`min(T,k)`, what slicing a fixed table to a length gives: ONNX Slice
    /// clamps its end to the axis) evaluate, name their operands as their symbols, merge
    /// when capped twice, and give the length back when broadcast against it.
    #[test]
    fn capped_sizes_evaluate_and_broadcast_back_to_the_length() {
        let t = Dim::sym("T");
        let m = t.lesser(&Dim::Known(512)).expect("expressible");
        assert_eq!(m, Dim::sym("min(T,512)"));
        assert_eq!(m.symbols(), ["T".to_string()]);
        assert_eq!(m.lesser(&Dim::Known(300)), Some(Dim::sym("min(T,300)")));
        assert_eq!(m.lesser(&Dim::Known(600)), Some(m.clone()));
        assert_eq!(Dim::Known(7).lesser(&t), Some(Dim::sym("min(T,7)")));
        assert_eq!(t.lesser(&Dim::Known(0)), Some(Dim::Known(0)));
        assert_eq!(t.lesser(&t), Some(t.clone()));
        assert_eq!(t.lesser(&Dim::Unknown), None);
        assert_eq!(
            Dim::sym("k@/m/TopK").lesser(&Dim::Known(3)),
            None,
            "node names are not read back"
        );
        assert_eq!(Dim::sym("seq len").lesser(&Dim::Known(3)), None);
        assert_eq!(Dim::sym("min(a,b+1)").symbols(), ["a".to_string(), "b".to_string()]);
        // A file's dim named `min` is a name like any other.
        assert_eq!(Dim::sym("min").symbols(), ["min".to_string()]);
        let sized = m.mul(&Dim::Known(8)).expect("product").offset(-1);
        assert_eq!(sized, Dim::sym("min(T,512)*8-1"));
        for v in [1u64, 100, 511, 512, 513, 4000] {
            let Dim::Sym(text) = &sized else { unreachable!() };
            assert_eq!(
                evaluate(text, &|x| (x == "T").then_some(v)),
                Ok(Some(v.min(512) * 8 - 1))
            );
        }
        for bad in ["min(T,5", "min(T)", "min(T,5,6)", "min T"] {
            assert_eq!(evaluate(bad, &|_| Some(1)), Err(NotAnExpression), "{bad}");
        }
        // Broadcasting (ONNX "Broadcasting in ONNX": two dims broadcast if equal or one is
        // 1, to the other) of T against min(T,k), at every T and k ≥ 1 where it is valid,
        // gives T: what `caps` lets the broadcast of shapes write.
        for k in 1..12u64 {
            let capped = t.lesser(&Dim::Known(k)).expect("expressible");
            assert!(capped.caps(&t));
            for v in 0..30u64 {
                let c = v.min(k);
                let out = if v == c || c == 1 {
                    Some(v)
                } else if v == 1 {
                    Some(c)
                } else {
                    None
                };
                if let Some(out) = out {
                    assert_eq!(out, v, "T = {v}, k = {k}");
                }
            }
        }
        assert!(!Dim::sym("min(T,0)").caps(&t));
        assert!(!m.caps(&Dim::sym("U")));
        assert!(!Dim::sym("min(T,U)").caps(&t), "U may be 0");
    }

    /// Sizes `never_one` vouches for are never 1 at any value of their symbols (evaluated
    /// over a range, floor division of whole numbers); the others can be.
    #[test]
    fn sizes_said_never_to_be_one_never_are() {
        let never = ["((H+31)/32)*2", "T*3", "min(T,4)*2", "(T-1)*2", "2*T", "((T+1)/2)*2*B"];
        let can = ["T", "T+1", "(T*2)/2", "T*2-1", "min(T,1)", "T*1", "(T*2+1)", "T/2"];
        for text in never {
            assert!(Dim::sym(text).never_one(), "{text}");
            for t in 0..300u64 {
                let v = evaluate(text, &|_| Some(t)).expect("an expression");
                assert_ne!(v, Some(1), "{text} at {t}");
            }
        }
        for text in can {
            assert!(!Dim::sym(text).never_one(), "{text}");
            assert!(
                (0..300u64).any(|t| evaluate(text, &|_| Some(t)) == Ok(Some(1))),
                "{text}"
            );
        }
        assert!(Dim::Known(0).never_one() && Dim::Known(7).never_one());
        assert!(!Dim::Known(1).never_one() && !Dim::Unknown.never_one());
        assert!(!Dim::sym("n@/m/NonZero*2").never_one(), "node names are not read");
    }

    /// Pads to a multiple, cuts to one, a roll's halves, a cache's length less the new one,
    /// and repeated terms: the dims `add`, `sub`, `modulo` and `lesser` write equal the same
    /// integer arithmetic done step by step (floor division and remainder of whole numbers,
    /// ONNX Mod, Pad, Slice and Concat sizes), and take the short forms.
    #[test]
    fn sums_differences_and_remainders_equal_integer_arithmetic() {
        let x = Dim::sym("H");
        for k in 1..9u64 {
            let kd = Dim::Known(k);
            let pad = kd
                .sub(&x.modulo(k).expect("mod"))
                .and_then(|d| d.modulo(k))
                .expect("pad");
            let padded = x.add(&pad).expect("sum");
            let cut = x.sub(&x.modulo(k).expect("mod")).expect("cut");
            for h in 0..80u64 {
                let at = |d: &Dim| match d {
                    Dim::Known(v) => Some(*v),
                    Dim::Sym(s) => evaluate(s, &|_| Some(h)).expect("readable"),
                    Dim::Unknown => None,
                };
                assert_eq!(at(&pad), Some((k - h % k) % k), "pad by {k} at {h}");
                assert_eq!(at(&padded), Some(h + (k - h % k) % k), "padded by {k} at {h}");
                assert_eq!(at(&cut), Some(h - h % k), "cut by {k} at {h}");
            }
            if k > 1 {
                assert_eq!(padded, x.offset(k as i64 - 1).div_floor(k).mul(&kd).expect("product"));
                assert_eq!(cut, x.div_floor(k).mul(&kd).expect("product"));
                // Cropping the padded map back to H, or H to the cut size, is that size.
                assert_eq!(x.lesser(&padded), Some(x.clone()));
                assert_eq!(padded.lesser(&x), Some(x.clone()));
                assert_eq!(cut.lesser(&x), Some(cut.clone()));
            }
            // A roll by k: `x[-k:]` then `x[:-k]`, concatenated, is x again.
            let rolled = x.lesser(&kd).expect("cap").add(&x.offset(-(k as i64))).expect("sum");
            assert_eq!(rolled, x, "roll by {k}");
        }
        let (p, s) = (Dim::sym("P"), Dim::sym("S"));
        let total = p.add(&s).expect("sum");
        assert_eq!(total, Dim::sym("P+S"), "a plain sum stays as written");
        assert_eq!(total.sub(&s), Some(p.clone()));
        assert_eq!(total.sub(&total), Some(Dim::Known(0)));
        assert_eq!(s.sub(&total), None, "below zero whatever P and S are");
        assert_eq!(p.sub(&s), Some(Dim::sym("P-(S)")));
        let w3 = Dim::sym("W").offset(3);
        assert_eq!(w3.add(&w3), Some(Dim::sym("W*2+6")));
        assert_eq!(Dim::sym("T*4").modulo(2), Some(Dim::Known(0)));
        assert_eq!(Dim::sym("H*2").div_floor(4), Dim::sym("H/2"));
        assert_eq!(Dim::sym("H*2+4").div_floor(4), Dim::sym("(H+2)/2"));
        assert_eq!(
            Dim::Known(4).mul(&Dim::sym("H")),
            Some(Dim::sym("H*4")),
            "the symbol first"
        );
        assert_eq!(
            Dim::sym("W+3").lesser(&Dim::Known(1)),
            Some(Dim::Known(1)),
            "W+3 is at least 3"
        );
        assert_eq!(Dim::sym("W+3").lesser(&Dim::Known(4)), Some(Dim::sym("min(W+3,4)")));
        assert_eq!(Dim::sym("B*S").modulo(3), Some(Dim::sym("(B*S)%3")));
        assert_eq!(Dim::sym("k@/m/TopK").modulo(3), None, "node names are not taken apart");
        assert_eq!(evaluate("7-(H%7)", &|_| Some(3)), Ok(Some(4)));
        assert_eq!(Dim::sym("P-(S)").symbols(), ["P".to_string(), "S".to_string()]);
        assert_eq!(Dim::sym("(7-(H%7))%7").symbols(), ["H".to_string()]);
        assert_eq!(Dim::sym("seq-len-2").symbols(), ["seq-len".to_string()]);
    }

    /// Random compositions of the dim operations over two symbols, evaluated at many values,
    /// against the same operations on whole numbers step by step: wherever every step is a
    /// size (no difference below zero, no division by zero), a dim that is known or
    /// readable gives that size. Dims that say unknown (`None`, `Dim::Unknown`) are allowed;
    /// a wrong size is not.
    #[test]
    fn composed_dim_operations_never_give_a_wrong_size() {
        #[derive(Clone, Copy)]
        enum Op {
            Add,
            Sub,
            Mul(u64),
            Div(u64),
            Mod(u64),
            Offset(i64),
            Min,
        }
        let mut seed = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = move |n: u64| {
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            seed % n
        };
        let mut wrong = Vec::new();
        let mut readable = 0;
        for _ in 0..6000 {
            // Besides the symbols and a number, a product and a sum with a product in it, so
            // that products of sums of products come up often.
            let (a, b) = (Dim::sym("a"), Dim::sym("b"));
            let b2 = b.mul(&Dim::Known(2)).expect("product");
            let leaves = [a.clone(), b, Dim::Known(next(9)), b2.clone(), a.add(&b2).expect("sum")];
            let mut dims: Vec<Dim> = leaves.to_vec();
            let mut steps = Vec::new();
            for _ in 0..(2 + next(7)) {
                let op = match next(7) {
                    0 => Op::Add,
                    1 => Op::Sub,
                    2 => Op::Mul(1 + next(4)),
                    3 => Op::Div(1 + next(8)),
                    4 => Op::Mod(1 + next(8)),
                    5 => Op::Offset(next(9) as i64 - 4),
                    _ => Op::Min,
                };
                let (i, j) = (next(dims.len() as u64) as usize, next(dims.len() as u64) as usize);
                let (l, r) = (&dims[i], &dims[j]);
                let d = match op {
                    Op::Add => l.add(r),
                    Op::Sub => l.sub(r),
                    Op::Mul(k) => l.mul(&Dim::Known(k)),
                    Op::Div(k) => Some(l.div_floor(k)),
                    Op::Mod(k) => l.modulo(k),
                    Op::Offset(k) => Some(l.offset(k)),
                    Op::Min => l.lesser(r),
                };
                dims.push(d.unwrap_or(Dim::Unknown));
                steps.push((op, i, j));
            }
            for (a, b) in [(0u64, 0u64), (1, 0), (3, 5), (7, 2), (12, 12), (30, 17), (64, 100)] {
                let mut v: Vec<Option<u64>> = vec![Some(a), Some(b), leaves[2].known(), Some(b * 2), Some(a + b * 2)];
                for &(op, i, j) in &steps {
                    let (l, r) = (v[i], v[j]);
                    v.push(match op {
                        Op::Add => l.zip(r).and_then(|(l, r)| l.checked_add(r)),
                        Op::Sub => l.zip(r).and_then(|(l, r)| l.checked_sub(r)),
                        Op::Mul(k) => l.and_then(|l| l.checked_mul(k)),
                        Op::Div(k) => l.map(|l| l / k),
                        Op::Mod(k) => l.map(|l| l % k),
                        Op::Offset(k) => l.and_then(|l| l.checked_add_signed(k)),
                        Op::Min => l.zip(r).map(|(l, r)| l.min(r)),
                    });
                }
                let (Some(want), Some(last)) = (v[v.len() - 1], dims.last()) else {
                    continue;
                };
                let got = match last {
                    Dim::Known(g) => Some(*g),
                    Dim::Sym(s) => {
                        let value = |n: &str| match n {
                            "a" => Some(a),
                            "b" => Some(b),
                            _ => None,
                        };
                        evaluate(s, &value).expect("tilecut's own dims read back")
                    }
                    Dim::Unknown => None,
                };
                if got.is_some() {
                    readable += 1;
                }
                if got.is_some_and(|g| g != want) {
                    wrong.push(format!("{last} at a={a}, b={b}: {got:?}, not {want}"));
                }
            }
        }
        assert!(
            wrong.is_empty(),
            "{} wrong sizes, first: {:?}",
            wrong.len(),
            &wrong[..wrong.len().min(5)]
        );
        assert!(readable > 5000, "only {readable} sizes were readable");
    }

    /// Dim texts come from files too (`dim_param`): the operations take any text apart
    /// without panicking, and whatever they write back reads as an expression or is one
    /// opaque name they were given.
    #[test]
    fn operations_on_arbitrary_dim_text_never_panic() {
        let alphabet = b"aH(()+-*/%,0123456789 min@.";
        let mut seed = 0x2545_f491_4f6c_dd1du64;
        let mut next = move |n: usize| {
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            (seed % n as u64) as usize
        };
        for _ in 0..20_000 {
            let (la, lb) = (1 + next(16), 1 + next(16));
            let mut text =
                |len: usize| -> String { (0..len).map(|_| alphabet[next(alphabet.len())] as char).collect() };
            let (a, b) = (Dim::sym(&text(la)), Dim::param(&text(lb)));
            let k = Dim::Known(3);
            for d in [
                a.add(&b),
                a.sub(&b),
                b.sub(&a),
                a.sub(&k),
                k.sub(&a),
                a.modulo(7),
                a.lesser(&b),
                a.lesser(&k),
                a.mul(&k),
                Some(a.div_floor(4)),
                Some(a.offset(-2)),
            ]
            .into_iter()
            .flatten()
            {
                let _ = d.symbols();
                let _ = d.never_one();
                if let Dim::Sym(s) = &d {
                    let _ = evaluate(s, &|_| Some(5));
                }
            }
        }
    }

    /// Shapes of equal dims share an allocation, and shapes stay what they were made of
    /// whatever the table holds: past its bound it starts again (checked by making more
    /// distinct lists than it keeps, then the first ones again).
    #[test]
    fn equal_dims_share_one_allocation_and_keep_their_contents() {
        let batch = Dim::sym("batch");
        let a = Shape::of([batch.clone(), Dim::Known(32), Dim::Known(64)]);
        let b = Shape::of(vec![Dim::sym("batch"), Dim::Known(32), Dim::Known(64)]);
        assert!(a.same_alloc(&b));
        assert_eq!(a, b);
        // A shorter list, or one more dim (unknown): not shared.
        let c = Shape::of([batch.clone(), Dim::Known(32)]);
        let d = Shape::of([batch.clone(), Dim::Known(32), Dim::Unknown]);
        assert!(!a.same_alloc(&c) && !a.same_alloc(&d) && c != d);
        let many: Vec<Shape> = (0..(SHARED_DIMS_MAX as u64 + 10))
            .map(|i| Shape::of([Dim::Known(i), Dim::Unknown]))
            .collect();
        for (i, s) in many.iter().enumerate() {
            assert_eq!(s.dims(), Some(&[Dim::Known(i as u64), Dim::Unknown][..]));
        }
        let again = Shape::of([Dim::Known(0), Dim::Unknown]);
        assert_eq!(again, many[0]);
    }
}
