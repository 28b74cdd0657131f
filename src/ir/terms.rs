//! Sums over symbolic dims taken apart into terms: like terms collected (`W+3+W+3` is
//! `W*2+6`), differences cancelled (a cache's `P+S` less `S` is `P`), and the whole-number
//! identities of padding a size to a multiple. `Dim::add`, `Dim::sub` and `Dim::lesser` use
//! it on the expressions tilecut writes (grammar: `shape.rs`, `evaluate`).

use super::shape::{balanced, depths, evaluate, has_top_level, min_sides, unwrapped, Dim, MAX_EXPRESSION};

/// A sum: each distinct term (its text without a whole-number factor) with its coefficient,
/// in first-seen order, and a constant.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(super) struct Terms {
    atoms: Vec<(String, i64)>,
    constant: i64,
}

/// More terms than this is no sum an exporter's shape arithmetic builds; such text is left as
/// it is.
const MAX_TERMS: usize = 32;

/// How deep parenthesized differences are taken apart (`a-(b-(c))`).
const MAX_NESTING: usize = 8;

impl Terms {
    /// The terms of a dim: `None` for an unknown dim, a data-dependent size (named after its
    /// node, whose name may hold any character), or text that is not a sum tilecut can read.
    pub(super) fn of(d: &Dim) -> Option<Terms> {
        match d {
            Dim::Known(v) => Some(Terms {
                atoms: Vec::new(),
                constant: i64::try_from(*v).ok()?,
            }),
            Dim::Sym(s) => parse(s, 0),
            Dim::Unknown => None,
        }
    }

    fn add_atom(&mut self, atom: &str, coef: i64) -> Option<()> {
        match self.atoms.iter().position(|(a, _)| a == atom) {
            Some(i) => self.atoms[i].1 = self.atoms[i].1.checked_add(coef)?,
            None if self.atoms.len() < MAX_TERMS => self.atoms.push((atom.to_string(), coef)),
            None => return None,
        }
        Some(())
    }

    /// `self + sign·other`.
    pub(super) fn plus(mut self, other: &Terms, sign: i64) -> Option<Terms> {
        for (a, c) in &other.atoms {
            self.add_atom(a, c.checked_mul(sign)?)?;
        }
        self.constant = self.constant.checked_add(other.constant.checked_mul(sign)?)?;
        Some(self)
    }

    fn scaled(mut self, k: i64) -> Option<Terms> {
        for (_, c) in &mut self.atoms {
            *c = c.checked_mul(k)?;
        }
        self.constant = self.constant.checked_mul(k)?;
        Some(self)
    }

    fn coef(&self, atom: &str) -> i64 {
        self.atoms.iter().find(|(a, _)| a == atom).map_or(0, |(_, c)| *c)
    }

    /// Whether `part` is in this sum: each of its terms with at least its coefficient (a
    /// positive one). The rest of the sum is then this less `part`.
    fn holds(&self, part: &Terms) -> bool {
        !part.atoms.is_empty() && part.atoms.iter().all(|(a, c)| *c > 0 && self.coef(a) >= *c)
    }

    /// Whether every coefficient and the constant are at least zero: a sum of sizes, never
    /// below zero.
    pub(super) fn nonnegative(&self) -> bool {
        self.constant >= 0 && self.atoms.iter().all(|(_, c)| *c >= 0)
    }

    pub(super) fn shares_a_term(&self, other: &Terms) -> bool {
        self.atoms.iter().any(|(a, _)| other.coef(a) != 0)
    }

    /// The sum with the identities of whole numbers x ≥ 0 and k > 0 applied (common
    /// practice, floor division and remainder of sizes):
    /// - `x + (k - x%k)%k` is `((x+k-1)/k)*k`: a size padded up to a multiple of k, the pad
    ///   written as exporters trace `(k - x % k) % k` (window attention, strided backbones);
    /// - `x - x%k` is `(x/k)*k`: a size cut down to a multiple of k;
    /// - `min(x,k) + x - k` is x: the two halves of a roll (`x[-k:]` and `x[:-k]`, the second
    ///   `x-k` under the slice convention that the axis holds what is cut) concatenated back.
    pub(super) fn tidy(mut self) -> Option<Terms> {
        // Each rewrite leaves fewer terms than it found, so the loop ends.
        'again: loop {
            for i in 0..self.atoms.len() {
                let (atom, c) = self.atoms[i].clone();
                if c == 1 {
                    if let Some((x, k)) = pad_to_multiple(&atom) {
                        if let Some(tx) = parse(&x, 1).filter(|tx| self.holds(tx)) {
                            let padded = Dim::sym(&x)
                                .offset(k - 1)
                                .div_floor(k as u64)
                                .mul(&Dim::Known(k as u64))?;
                            self.atoms[i].1 = 0;
                            self = self.plus(&tx, -1)?.plus(&Terms::of(&padded)?, 1)?;
                            self.atoms.retain(|(_, c)| *c != 0);
                            continue 'again;
                        }
                    }
                    if let Some((x, k)) = capped(&atom) {
                        if parse(x, 1).is_some_and(|tx| self.holds(&tx) && self.constant <= -k) {
                            self.atoms[i].1 = 0;
                            self.constant = self.constant.checked_add(k)?;
                            self.atoms.retain(|(_, c)| *c != 0);
                            continue 'again;
                        }
                    }
                }
                if c == -1 {
                    if let Some((x, k)) = remainder(&atom) {
                        if let Some(tx) = parse(x, 1).filter(|tx| self.holds(tx)) {
                            let whole = Dim::sym(x).div_floor(k as u64).mul(&Dim::Known(k as u64))?;
                            self.atoms[i].1 = 0;
                            self = self.plus(&tx, -1)?.plus(&Terms::of(&whole)?, 1)?;
                            self.atoms.retain(|(_, c)| *c != 0);
                            continue 'again;
                        }
                    }
                }
            }
            return Some(self);
        }
    }

    /// The sum as a dim, terms added before any is taken away (so that, evaluated left to
    /// right, no partial result goes below zero where the whole does not). `None` for a sum
    /// below zero whatever its symbols, or text too long or not readable back.
    pub(super) fn render(&self) -> Option<Dim> {
        let live = || self.atoms.iter().filter(|(_, c)| *c != 0);
        if live().next().is_none() {
            return u64::try_from(self.constant).ok().map(Dim::Known);
        }
        let mut out = String::new();
        let mut positive = live().filter(|(_, c)| *c > 0).peekable();
        let leads = positive.peek().is_some();
        if !leads {
            if self.constant <= 0 {
                return None;
            }
            out.push_str(&self.constant.to_string());
        }
        for (i, (a, c)) in positive.enumerate() {
            if i > 0 {
                out.push('+');
            }
            out.push_str(&term(a, *c));
        }
        for (a, c) in live().filter(|(_, c)| *c < 0) {
            out.push_str("-(");
            out.push_str(&term(a, c.checked_neg()?));
            out.push(')');
        }
        if leads {
            match self.constant {
                0 => {}
                k if k > 0 => out.push_str(&format!("+{k}")),
                k => out.push_str(&format!("-{}", k.unsigned_abs())),
            }
        }
        (out.len() < MAX_EXPRESSION && evaluate(&out, &|_| Some(1)).is_ok()).then(|| Dim::sym(&out))
    }
}

/// One term as text: the atom times its coefficient.
fn term(atom: &str, c: i64) -> String {
    match c {
        1 => atom.to_string(),
        _ if has_top_level(atom, b"+-/%") => format!("({atom})*{c}"),
        _ => format!("{atom}*{c}"),
    }
}

/// `s` as signed terms. A `-` before a whole number or a parenthesis takes away; one inside
/// a name (`seq-len`) is part of the name.
fn parse(s: &str, nesting: usize) -> Option<Terms> {
    if nesting > MAX_NESTING || s.is_empty() || s.contains(['@']) || s.contains(char::is_whitespace) {
        return None;
    }
    let mut t = Terms {
        atoms: Vec::new(),
        constant: 0,
    };
    let bytes = s.as_bytes();
    let mut start = 0;
    let mut sign = 1i64;
    for (i, (b, depth)) in depths(s).enumerate().chain(std::iter::once((s.len(), (b'+', 0)))) {
        let split = depth == 0 && (b == b'+' || takes_away(bytes, i));
        if !split {
            continue;
        }
        let piece = &s[start..i];
        if piece.is_empty() {
            return None;
        }
        if piece.bytes().all(|c| c.is_ascii_digit()) {
            let v = i64::try_from(piece.parse::<u64>().ok()?).ok()?;
            t.constant = t.constant.checked_add(v.checked_mul(sign)?)?;
        } else if sign < 0 {
            // Only a parenthesized expression is taken away (`-(b)`), never a bare name.
            let inner = piece.strip_prefix('(')?.strip_suffix(')')?;
            if !balanced(inner) {
                return None;
            }
            t = t.plus(&parse(inner, nesting + 1)?, -1)?;
        } else {
            // Whole-number factors off, parentheses open, as long as either applies:
            // `2*(a*3)` is (a, 6).
            let (mut atom, mut k) = (piece, 1i64);
            for _ in 0..MAX_NESTING {
                // A sum opened from its parentheses is taken apart below, not factored:
                // `(a+b*2)*3` is a·3 + b·6.
                if has_top_level(atom, b"+") || splits_at_minus(atom) {
                    break;
                }
                let (inner, f) = factored(atom)?;
                let inner = unwrapped(inner);
                k = k.checked_mul(f)?;
                if inner == atom {
                    break;
                }
                atom = inner;
            }
            if atom.bytes().all(|c| c.is_ascii_digit()) {
                let v = i64::try_from(atom.parse::<u64>().ok()?).ok()?;
                t.constant = t.constant.checked_add(v.checked_mul(k)?)?;
            } else if has_top_level(atom, b"+") || splits_at_minus(atom) {
                // A parenthesized sum times a number: its terms, each times the number.
                t = t.plus(&parse(atom, nesting + 1)?.scaled(k)?, 1)?;
            } else {
                t.add_atom(atom, k)?;
            }
        }
        sign = if b == b'-' { -1 } else { 1 };
        start = i + 1;
    }
    Some(t)
}

/// Whether `s` has a top-level `-` that takes away.
fn splits_at_minus(s: &str) -> bool {
    depths(s)
        .enumerate()
        .any(|(i, (_, d))| d == 0 && takes_away(s.as_bytes(), i))
}

/// Whether the byte at `i` is a `-` that takes away: one before a whole number or a
/// parenthesis (`T-2`, `a-(b)`), not one inside a name (`seq-len`).
fn takes_away(s: &[u8], i: usize) -> bool {
    s.get(i) == Some(&b'-') && s.get(i + 1).is_some_and(|c| c.is_ascii_digit() || *c == b'(')
}

/// A term without its whole-number factor: `W*2` and `2*W` are (W, 2). A leading factor is
/// taken off only where the rest is a plain product (`2*W/3` is (2·W)/3, not 2·(W/3)).
fn factored(piece: &str) -> Option<(&str, i64)> {
    let mut last_star = None;
    for (i, (b, depth)) in depths(piece).enumerate() {
        if depth == 0 && b == b'*' {
            last_star = Some(i);
        }
    }
    if let Some(i) = last_star {
        let k = &piece[i + 1..];
        if !k.is_empty() && k.bytes().all(|c| c.is_ascii_digit()) {
            return Some((&piece[..i], i64::try_from(k.parse::<u64>().ok()?).ok()?));
        }
    }
    if let Some((k, rest)) = piece.split_once('*') {
        if !k.is_empty() && k.bytes().all(|c| c.is_ascii_digit()) && !has_top_level(rest, b"/%") {
            return Some((rest, i64::try_from(k.parse::<u64>().ok()?).ok()?));
        }
    }
    Some((piece, 1))
}

/// `x%k` (the remainder of a size by a whole number): (x, k). The `%` is the last operator
/// at the top level, so that `x` is all that comes before it (`a*b%k` is `(a*b)%k`).
fn remainder(atom: &str) -> Option<(&str, i64)> {
    let (i, _) = depths(atom)
        .enumerate()
        .filter(|(_, (b, d))| *d == 0 && *b == b'%')
        .last()?;
    let k = &atom[i + 1..];
    if k.is_empty() || !k.bytes().all(|c| c.is_ascii_digit()) {
        return None;
    }
    let k = i64::try_from(k.parse::<u64>().ok()?).ok().filter(|&k| k > 0)?;
    let x = unwrapped(&atom[..i]);
    (!x.is_empty() && balanced(x)).then_some((x, k))
}

/// `(k-(x%k))%k`, the pad that takes x up to a multiple of k: (x, k).
fn pad_to_multiple(atom: &str) -> Option<(String, i64)> {
    let (q, k) = remainder(atom)?;
    let inner = parse(q, 1)?;
    if inner.constant != k || inner.atoms.len() != 1 {
        return None;
    }
    let (a, c) = &inner.atoms[0];
    let (x, m) = remainder(a)?;
    (*c == -1 && m == k).then(|| (x.to_string(), k))
}

/// `min(x,k)` for a whole number k: (x, k).
fn capped(atom: &str) -> Option<(&str, i64)> {
    let (x, k) = min_sides(atom)?;
    let k: i64 = k.parse().ok().filter(|&k| k >= 0)?;
    (!x.is_empty()).then_some((x, k))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sum(s: &str) -> Terms {
        parse(s, 0).expect(s)
    }

    #[test]
    fn sums_take_apart_into_terms() {
        let t = sum("W+3+W*2+2*W-1");
        assert_eq!(t.atoms, [("W".to_string(), 5)]);
        assert_eq!(t.constant, 2);
        let t = sum("(P+S)*2-(S)");
        assert_eq!(t.atoms, [("P".to_string(), 2), ("S".to_string(), 1)]);
        // A dash inside a name is the name's.
        assert_eq!(sum("seq-len+1").atoms, [("seq-len".to_string(), 1)]);
        // A leading factor before a quotient is not a factor of the quotient.
        assert_eq!(sum("2*W/3").atoms, [("2*W/3".to_string(), 1)]);
        assert_eq!(sum("2*(a*3)+(b)").atoms, [("a".to_string(), 6), ("b".to_string(), 1)]);
        assert_eq!(sum("3*2+a").constant, 6);
        assert_eq!(sum("(a+b*2)*3").atoms, [("a".to_string(), 3), ("b".to_string(), 6)]);
        assert_eq!(sum("(a+b*2)").atoms, [("a".to_string(), 1), ("b".to_string(), 2)]);
        // Only a number or a parenthesis after a dash takes away.
        assert_eq!(sum("a-b").atoms, [("a-b".to_string(), 1)]);
        assert_eq!(sum("a-(b)").atoms, [("a".to_string(), 1), ("b".to_string(), -1)]);
        assert!(parse("k@/m/TopK+1", 0).is_none());
    }
}
