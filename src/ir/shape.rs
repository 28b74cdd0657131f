//! Dimensions and shapes: a dim is a known size, a named symbol, or unknown.

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

    /// The symbol names the dim depends on (identifiers in its expression).
    pub fn symbols(&self) -> Vec<String> {
        match self {
            Dim::Sym(s) => s
                .split(['*', '+', '(', ')'])
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
            Dim::Sym(s) if s.contains('+') => Some(format!("({s})")),
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
            (a, b) => Dim::sym(&format!("{}*{}", a.wrap()?, b.wrap()?)),
        })
    }

    pub fn add(&self, other: &Dim) -> Option<Dim> {
        Some(match (self, other) {
            (Dim::Known(a), Dim::Known(b)) => Dim::Known(a.checked_add(*b)?),
            (Dim::Known(0), d) | (d, Dim::Known(0)) => d.clone(),
            (Dim::Unknown, _) | (_, Dim::Unknown) => Dim::Unknown,
            (a, b) => Dim::sym(&format!("{}+{}", a.wrap()?, b.wrap()?)),
        })
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

/// A shape: `None` when even the rank is unknown.
#[derive(Clone, Debug, PartialEq, Eq, Hash)]
pub struct Shape(pub Option<Vec<Dim>>);

impl Shape {
    pub fn unknown() -> Shape {
        Shape(None)
    }

    pub fn known(dims: &[u64]) -> Shape {
        Shape(Some(dims.iter().map(|&d| Dim::Known(d)).collect()))
    }

    pub fn of(dims: Vec<Dim>) -> Shape {
        Shape(Some(dims))
    }

    pub fn scalar() -> Shape {
        Shape(Some(Vec::new()))
    }

    /// Unknown dims of a known rank.
    pub fn of_rank(rank: usize) -> Shape {
        Shape(Some(vec![Dim::Unknown; rank]))
    }

    pub fn dims(&self) -> Option<&[Dim]> {
        self.0.as_deref()
    }

    pub fn rank(&self) -> Option<usize> {
        self.0.as_ref().map(Vec::len)
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
    pub fn symbols_into(&self, out: &mut Vec<Name>) {
        for d in self.0.iter().flatten() {
            let Dim::Sym(s) = d else { continue };
            let simple = !s.contains(['*', '+', '(', ')']);
            if simple {
                if !out.iter().any(|x| x == s) && s.parse::<u64>().is_err() {
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
        let mut out: Vec<String> = self.0.iter().flatten().flat_map(Dim::symbols).collect();
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
