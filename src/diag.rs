//! Findings: what a model contains that the user should know, returned beside results.

use serde::Serialize;

/// One finding. `code` is a stable identifier of tilecut's own naming.
#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub struct Diagnostic {
    pub code: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub node: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub tensor: Option<String>,
    pub message: String,
}

impl Diagnostic {
    pub fn new(code: &'static str, message: impl Into<String>) -> Diagnostic {
        Diagnostic {
            code,
            node: None,
            tensor: None,
            message: message.into(),
        }
    }

    pub fn at_node(mut self, node: &str) -> Diagnostic {
        self.node = Some(node.to_string());
        self
    }

    pub fn at_tensor(mut self, tensor: &str) -> Diagnostic {
        self.tensor = Some(tensor.to_string());
        self
    }
}

/// Codes of reader findings, in one place so they stay unique.
pub mod codes {
    pub const UNKNOWN_OP: &str = "op-unknown";
    pub const SYMBOLIC_DIM: &str = "dim-symbolic";
    pub const UNKNOWN_DIM: &str = "dim-unknown";
    pub const EXTERNAL_MISSING: &str = "external-missing";
    pub const SHAPE_DISAGREES: &str = "shape-disagrees";
    pub const SHAPE_FAILED: &str = "shape-failed";
    pub const UNUSED_INITIALIZER: &str = "initializer-unused";
    pub const INITIALIZER_AS_INPUT: &str = "initializer-as-input";
    pub const OVERRIDE_UNUSED: &str = "override-unused";
    pub const OVERRIDE_CONFLICT: &str = "override-conflict";
    pub const OPSET_MISSING: &str = "opset-missing";
    pub const DECLARED_FALLBACK: &str = "shape-from-file";
    pub const ASSUMPTION_UNUSED: &str = "assumption-unused";

    /// Every code above: the README lists them for users (a test holds it to that).
    pub const ALL: &[&str] = &[
        UNKNOWN_OP,
        SYMBOLIC_DIM,
        UNKNOWN_DIM,
        EXTERNAL_MISSING,
        SHAPE_DISAGREES,
        SHAPE_FAILED,
        UNUSED_INITIALIZER,
        INITIALIZER_AS_INPUT,
        OVERRIDE_UNUSED,
        OVERRIDE_CONFLICT,
        OPSET_MISSING,
        DECLARED_FALLBACK,
        ASSUMPTION_UNUSED,
    ];
}

#[cfg(test)]
mod tests {
    #[test]
    fn every_code_is_unique_and_documented_in_the_readme() {
        let readme = include_str!("../README.md");
        let mut seen = std::collections::BTreeSet::new();
        for c in super::codes::ALL {
            assert!(seen.insert(*c), "code `{c}` used twice");
            assert!(
                readme.contains(&format!("`{c}`")),
                "README does not list warning code `{c}`"
            );
        }
    }
}
