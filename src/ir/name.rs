//! `Name`: a shared, immutable string for the few distinct texts a graph repeats on every
//! node (op types, domains, symbolic dims). A 100k-node graph has a handful of op types; as
//! `Name`s they are one allocation each, warm in cache, instead of one heap string per node.
//! A thin pointer (8 bytes, not the 16 of `Arc<str>`), so that a `Dim` fits in 16 bytes.

use std::sync::Arc;

#[derive(Clone, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Name(Arc<String>);

impl Name {
    pub fn as_str(&self) -> &str {
        &self.0
    }

    /// The address of the shared text: two `Name`s from one interner have equal addresses
    /// exactly when their texts are equal, which lets per-node caches key on an integer.
    pub fn addr(&self) -> usize {
        Arc::as_ptr(&self.0) as usize
    }
}

impl Default for Name {
    fn default() -> Self {
        Name(Arc::new(String::new()))
    }
}

impl std::ops::Deref for Name {
    type Target = str;

    fn deref(&self) -> &str {
        &self.0
    }
}

impl std::borrow::Borrow<str> for Name {
    fn borrow(&self) -> &str {
        &self.0
    }
}

impl From<&str> for Name {
    fn from(s: &str) -> Name {
        Name(Arc::new(s.into()))
    }
}

impl From<String> for Name {
    fn from(s: String) -> Name {
        Name(Arc::new(s))
    }
}

impl PartialEq<&str> for Name {
    fn eq(&self, other: &&str) -> bool {
        self.0.as_str() == *other
    }
}

impl PartialEq<String> for Name {
    fn eq(&self, other: &String) -> bool {
        self.0.as_str() == other.as_str()
    }
}

impl std::fmt::Display for Name {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::fmt::Debug for Name {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        std::fmt::Debug::fmt(self.0.as_str(), f)
    }
}

impl PartialEq<Name> for String {
    fn eq(&self, other: &Name) -> bool {
        self.as_str() == other.0.as_str()
    }
}

impl PartialEq<Name> for &str {
    fn eq(&self, other: &Name) -> bool {
        *self == other.0.as_str()
    }
}
