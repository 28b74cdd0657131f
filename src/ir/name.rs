//! `Name`: a shared, immutable string for the few distinct texts a graph repeats on every
//! node (op types, domains, attribute names, symbolic dims). A 100k-node graph has a handful
//! of op types; as `Name`s they are one allocation each, warm in cache, instead of one heap
//! string per node. A thin pointer (8 bytes, not the 16 of `&str`), so that a `Dim` fits in
//! 16 bytes.
//!
//! Every `Name` is interned in one table for the process and its text is never freed: a
//! copy is a pointer copy. As a reference-counted string, each copy and drop was an atomic
//! operation, and inference copies a symbolic batch dim into every tensor's shape (about a
//! tenth of inference on a 100k-node stack went to those counts). What stays allocated is
//! one string per distinct text the process meets: op types, attribute and dim names, and
//! the names of data-dependent sizes (`count@node`), bounded by the models it reads.

use std::collections::HashMap;
use std::sync::{Mutex, OnceLock};

#[derive(Clone, Eq, PartialOrd, Ord)]
pub struct Name(&'static String);

/// Every text a `Name` was made of, once: the key is the value's own text.
fn table() -> &'static Mutex<HashMap<&'static str, &'static String>> {
    static TABLE: OnceLock<Mutex<HashMap<&'static str, &'static String>>> = OnceLock::new();
    TABLE.get_or_init(Default::default)
}

fn intern(s: &str) -> Name {
    // A panic elsewhere while the lock was held leaves the table whole: each insert is one
    // call, so a poisoned lock is used as it is.
    let mut t = table().lock().unwrap_or_else(|e| e.into_inner());
    if let Some(&text) = t.get(s) {
        return Name(text);
    }
    let text: &'static String = Box::leak(Box::new(s.to_owned()));
    t.insert(text.as_str(), text);
    Name(text)
}

impl Name {
    pub fn as_str(&self) -> &str {
        self.0
    }

    /// The address of the shared text: two `Name`s have equal addresses exactly when their
    /// texts are equal (one table for the process), which lets per-node caches key on an
    /// integer.
    pub fn addr(&self) -> usize {
        std::ptr::from_ref::<String>(self.0) as usize
    }
}

impl PartialEq for Name {
    fn eq(&self, other: &Name) -> bool {
        // Interned: equal texts share an address.
        std::ptr::eq(self.0, other.0)
    }
}

impl std::hash::Hash for Name {
    fn hash<H: std::hash::Hasher>(&self, h: &mut H) {
        // By text, as `str` hashes: sets of names are looked up with a `&str` (`Borrow`).
        self.0.as_str().hash(h)
    }
}

impl Default for Name {
    fn default() -> Self {
        intern("")
    }
}

impl std::ops::Deref for Name {
    type Target = str;

    fn deref(&self) -> &str {
        self.0
    }
}

impl std::borrow::Borrow<str> for Name {
    fn borrow(&self) -> &str {
        self.0
    }
}

impl From<&str> for Name {
    fn from(s: &str) -> Name {
        intern(s)
    }
}

impl From<String> for Name {
    fn from(s: String) -> Name {
        intern(&s)
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
        f.write_str(self.0)
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

#[cfg(test)]
mod tests {
    use super::Name;

    /// Equality is by address, so it holds only if every way of making a `Name` interns:
    /// texts made apart (from a `&str`, a `String`, on another thread) must share one.
    #[test]
    fn equal_texts_share_one_address_however_made() {
        let a = Name::from("batch");
        let b = Name::from(String::from("batch"));
        let c = std::thread::spawn(|| Name::from("batch")).join().expect("thread");
        assert_eq!(a, b);
        assert_eq!(a, c);
        assert_eq!(a.addr(), c.addr());
        assert_ne!(a, Name::from("batch_size"));
        assert_eq!(Name::default(), Name::from(""));
    }

    /// Sets of names are looked up by `&str` (`Borrow<str>`): a name must hash as its text.
    #[test]
    fn a_name_hashes_and_orders_as_its_text() {
        let set: std::collections::HashSet<Name> = ["axis", "perm"].into_iter().map(Name::from).collect();
        assert!(set.contains("perm"));
        assert!(!set.contains("pads"));
        let mut v = [Name::from("b"), Name::from("a"), Name::from("c")];
        v.sort();
        assert_eq!(v.iter().map(|n| n.as_str()).collect::<Vec<_>>(), ["a", "b", "c"]);
    }
}
