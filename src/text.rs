//! Small text helpers shared by the TOML file readers and the pattern options.

/// A TOML parse error as one line: position, the text at it, and the parser's message.
pub fn toml_error(text: &str, e: &toml::de::Error) -> String {
    let msg = e.message().replace('\n', " ");
    match e.span() {
        Some(span) => {
            let before = &text[..span.start.min(text.len())];
            let line = before.matches('\n').count() + 1;
            let col = before.len() - before.rfind('\n').map(|i| i + 1).unwrap_or(0) + 1;
            let key = text
                .get(span)
                .and_then(|s| s.lines().next())
                .unwrap_or("")
                .trim()
                .to_string();
            format!("line {line}, column {col} (`{key}`): {msg}")
        }
        None => msg,
    }
}

/// `*` wildcard match over the whole text (no other metacharacters).
pub fn glob(pattern: &str, text: &str) -> bool {
    let parts: Vec<&str> = pattern.split('*').collect();
    if parts.len() == 1 {
        return pattern == text;
    }
    let mut rest = text;
    for (i, p) in parts.iter().enumerate() {
        if i == 0 {
            match rest.strip_prefix(p) {
                Some(r) => rest = r,
                None => return false,
            }
        } else if i == parts.len() - 1 {
            return rest.ends_with(p);
        } else {
            match rest.find(p) {
                Some(k) => rest = &rest[k + p.len()..],
                None => return false,
            }
        }
    }
    true
}

/// The command-line setting that makes a symbol known: `--dim NAME=N` for a symbolic dim,
/// `--loop-trips NODE=N` for a Loop's trip count (symbols `trips@NODE`), and `--dim` with an
/// assumed count for a data-dependent size (`what@node`).
pub fn fix_hint(symbol: &str) -> String {
    match symbol.split_once('@') {
        Some(("trips", node)) => format!("--loop-trips {node}=N"),
        Some(_) => format!("--dim {symbol}=N (data-dependent: assume a count)"),
        None => format!("--dim {symbol}=N"),
    }
}

/// Reads a whole input file the user names (profile, policy, feed), refusing what is not a
/// regular file first: a FIFO would block the read, a device would never end it.
pub fn read_file(path: &std::path::Path) -> std::io::Result<Vec<u8>> {
    let meta = std::fs::metadata(path)?;
    if !meta.is_file() {
        return Err(std::io::Error::new(
            std::io::ErrorKind::InvalidInput,
            "not a regular file (a folder, pipe, socket or device?)",
        ));
    }
    std::fs::read(path)
}

/// `read_file` for text.
pub fn read_text_file(path: &std::path::Path) -> std::io::Result<String> {
    String::from_utf8(read_file(path)?)
        .map_err(|_| std::io::Error::new(std::io::ErrorKind::InvalidData, "not UTF-8 text"))
}

#[cfg(test)]
mod tests {
    use super::glob;

    #[test]
    fn glob_patterns() {
        assert!(glob("conv*", "conv_12"));
        assert!(glob("*_head", "box_head"));
        assert!(glob("a*b*c", "axxbyyc"));
        assert!(!glob("a*b", "ac"));
        assert!(glob("exact", "exact"));
    }
}
