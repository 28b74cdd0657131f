//! `Text`: a node's or value's name. Borrowed from the model file when the file stays mapped
//! for the whole process (`onnx::load::MapLife::Process`), which spares a large graph one
//! allocation and one copy per name (on a 100k-node graph, 200k allocations of import's
//! 517k); owned otherwise. Reads like a `String` for everything else.

use std::borrow::Cow;

#[derive(Clone, Default, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Text(Cow<'static, str>);

impl Text {
    /// Text that lives as long as the process (a file mapped for the process, or a literal).
    pub fn borrowed(s: &'static str) -> Text {
        Text(Cow::Borrowed(s))
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    /// Whether the text is borrowed (from a file mapped for the process) rather than owned.
    pub fn is_borrowed(&self) -> bool {
        matches!(self.0, Cow::Borrowed(_))
    }
}

impl std::ops::Deref for Text {
    type Target = str;

    fn deref(&self) -> &str {
        &self.0
    }
}

impl AsRef<str> for Text {
    fn as_ref(&self) -> &str {
        &self.0
    }
}

impl std::borrow::Borrow<str> for Text {
    fn borrow(&self) -> &str {
        &self.0
    }
}

impl From<&str> for Text {
    fn from(s: &str) -> Text {
        Text(Cow::Owned(s.to_string()))
    }
}

impl From<String> for Text {
    fn from(s: String) -> Text {
        Text(Cow::Owned(s))
    }
}

impl From<Text> for String {
    fn from(t: Text) -> String {
        t.0.into_owned()
    }
}

impl PartialEq<str> for Text {
    fn eq(&self, other: &str) -> bool {
        self.as_str() == other
    }
}

impl PartialEq<&str> for Text {
    fn eq(&self, other: &&str) -> bool {
        self.as_str() == *other
    }
}

impl PartialEq<String> for Text {
    fn eq(&self, other: &String) -> bool {
        self.as_str() == other.as_str()
    }
}

impl PartialEq<Text> for String {
    fn eq(&self, other: &Text) -> bool {
        self.as_str() == other.as_str()
    }
}

impl PartialEq<Text> for &str {
    fn eq(&self, other: &Text) -> bool {
        *self == other.as_str()
    }
}

impl std::fmt::Display for Text {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::fmt::Debug for Text {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        std::fmt::Debug::fmt(self.as_str(), f)
    }
}

impl serde::Serialize for Text {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn borrowed_and_owned_text_compare_hash_and_order_alike() {
        use std::hash::BuildHasher;
        let a = Text::borrowed("b0.q");
        let b = Text::from("b0.q".to_string());
        assert_eq!(a, b);
        let h = std::collections::hash_map::RandomState::new();
        assert_eq!(h.hash_one(&a), h.hash_one(&b));
        let (x, y) = (Text::borrowed("a"), Text::from("b"));
        assert!(x < y);
        assert_eq!(format!("{a} {b:?}"), "b0.q \"b0.q\"");
        assert_eq!(String::from(a), "b0.q");
    }
}
