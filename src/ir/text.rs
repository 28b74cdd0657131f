//! `Text`: a node's or value's name. Borrowed from the model file when the file stays mapped
//! for the whole process (`onnx::load::MapLife::Process`), which spares a large graph one
//! allocation and one copy per name (on a 100k-node graph, 200k allocations of import's
//! 517k); owned otherwise. Reads like a `String` for everything else.

use std::ptr::NonNull;

/// Sixteen bytes, where a `Cow<'static, str>` takes 24: a graph holds one per node and one
/// per value, so on a 100k-node graph the eight bytes are 1.6 MB less fresh memory for every
/// import, and a process that reads one model pays the kernel for each page it first touches
/// (DEVELOPERS.md, on counting page faults).
pub struct Text {
    /// The first byte of the text (dangling, for an empty text).
    ptr: NonNull<u8>,
    /// The length in bytes, with `OWNED` set when `ptr` came from a `Box<str>` this text
    /// frees. An allocation never exceeds `isize::MAX` bytes, so the top bit is free.
    len: usize,
}

const OWNED: usize = 1 << (usize::BITS - 1);

// SAFETY: a `Text` is either a `&'static str` or a `Box<str>` it alone owns; both are `Send`
// and `Sync`, and no method mutates the bytes through a shared reference.
unsafe impl Send for Text {}
// SAFETY: as for `Send`.
unsafe impl Sync for Text {}

impl Text {
    /// Text that lives as long as the process (a file mapped for the process, or a literal).
    pub fn borrowed(s: &'static str) -> Text {
        Text {
            ptr: NonNull::from(s.as_bytes()).cast(),
            len: s.len(),
        }
    }

    fn owned(s: Box<str>) -> Text {
        let len = s.len();
        let ptr = NonNull::from(Box::leak(s)).cast();
        Text { ptr, len: len | OWNED }
    }

    pub fn as_str(&self) -> &str {
        // SAFETY: `ptr` and the length are those of a `str` that lives as long as `self`
        // (static, or the box this text owns), so the bytes are valid UTF-8 of that length.
        unsafe { std::str::from_utf8_unchecked(std::slice::from_raw_parts(self.ptr.as_ptr(), self.len & !OWNED)) }
    }

    /// Whether the text is borrowed (from a file mapped for the process) rather than owned.
    pub fn is_borrowed(&self) -> bool {
        self.len & OWNED == 0
    }
}

impl Drop for Text {
    fn drop(&mut self) {
        if !self.is_borrowed() {
            let len = self.len & !OWNED;
            let bytes = std::ptr::slice_from_raw_parts_mut(self.ptr.as_ptr(), len) as *mut str;
            // SAFETY: an owned text's pointer and length are those `Text::owned` leaked from
            // a `Box<str>`, freed only here, once.
            drop(unsafe { Box::from_raw(bytes) });
        }
    }
}

impl Clone for Text {
    fn clone(&self) -> Text {
        if self.is_borrowed() {
            Text {
                ptr: self.ptr,
                len: self.len,
            }
        } else {
            Text::owned(self.as_str().into())
        }
    }
}

impl Default for Text {
    fn default() -> Text {
        Text::borrowed("")
    }
}

impl PartialEq for Text {
    fn eq(&self, other: &Text) -> bool {
        self.as_str() == other.as_str()
    }
}

impl Eq for Text {}

impl PartialOrd for Text {
    fn partial_cmp(&self, other: &Text) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Text {
    fn cmp(&self, other: &Text) -> std::cmp::Ordering {
        self.as_str().cmp(other.as_str())
    }
}

/// Hashes as the `str` it holds, as `Borrow<str>` requires of keys looked up by `&str`.
impl std::hash::Hash for Text {
    fn hash<H: std::hash::Hasher>(&self, state: &mut H) {
        self.as_str().hash(state)
    }
}

impl std::ops::Deref for Text {
    type Target = str;

    fn deref(&self) -> &str {
        self.as_str()
    }
}

impl AsRef<str> for Text {
    fn as_ref(&self) -> &str {
        self.as_str()
    }
}

impl std::borrow::Borrow<str> for Text {
    fn borrow(&self) -> &str {
        self.as_str()
    }
}

impl From<&str> for Text {
    fn from(s: &str) -> Text {
        Text::owned(s.into())
    }
}

impl From<String> for Text {
    fn from(s: String) -> Text {
        Text::owned(s.into_boxed_str())
    }
}

impl From<Text> for String {
    fn from(t: Text) -> String {
        t.as_str().to_string()
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
        f.write_str(self.as_str())
    }
}

impl std::fmt::Debug for Text {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        std::fmt::Debug::fmt(self.as_str(), f)
    }
}

impl serde::Serialize for Text {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.as_str())
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

    #[test]
    fn owned_text_clones_and_drops_its_own_copy() {
        let made = Text::from(format!("{}~{}", "conv", 2));
        let copy = made.clone();
        drop(made);
        assert_eq!(copy, "conv~2");
        assert!(!copy.is_borrowed());
        let empty = Text::from(String::new());
        assert_eq!(empty.clone().as_str(), "");
        assert_eq!(Text::default(), empty);
        let kept = Text::borrowed("x");
        assert!(kept.clone().is_borrowed());
        // The borrowed/owned flag is not part of the length.
        assert_eq!(Text::from("abc").len(), 3);
    }
}
