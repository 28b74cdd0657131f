//! Output paths held apart from the files a command reads. Every report, baseline and split
//! folder is written by renaming a finished temporary into place, so an output path that
//! names the model, its external data, the policy or the baseline would replace that input:
//! `analyze m.onnx --html m.onnx` or `split d/m.onnx --out d --force` destroyed the model.
//! Such paths are refused before anything is written.

use std::path::{Path, PathBuf};

use crate::error::SettingError;
use crate::ir::{AttrValue, Graph, TensorData};

/// The files a command reads, as canonical paths (symbolic links and `..` resolved), so that
/// two spellings of one file compare equal.
#[derive(Debug, Default)]
pub struct Reads {
    files: Vec<PathBuf>,
}

impl Reads {
    /// Adds a file the command reads; one that does not exist cannot be overwritten and is
    /// left out.
    pub fn add(&mut self, path: &Path) {
        if let Ok(p) = path.canonicalize() {
            if !self.files.contains(&p) {
                self.files.push(p);
            }
        }
    }

    /// Adds the model file and every external-data file its graphs (subgraphs and attribute
    /// tensors included) point to.
    pub fn add_model(&mut self, path: &Path, graph: &Graph) {
        self.add(path);
        let mut external = Vec::new();
        external_files(graph, &mut external);
        for p in external {
            self.add(&p);
        }
    }

    /// Refuses a file output (`flag` names the option) that is one of the files read, or that
    /// cannot be written where it points (see `check_place`).
    pub fn check_file(&self, flag: &str, out: &Path) -> Result<(), SettingError> {
        check_place(flag, out)?;
        let Some(target) = resolved(out) else {
            return Ok(());
        };
        match self.files.iter().find(|f| **f == target) {
            Some(f) => Err(SettingError(format!(
                "{}: {flag} would overwrite {}, which this command reads",
                out.display(),
                f.display()
            ))),
            None => Ok(()),
        }
    }

    /// Refuses an output folder (replaced as a whole) that is or holds one of the files read.
    pub fn check_folder(&self, flag: &str, out: &Path) -> Result<(), SettingError> {
        let Ok(target) = out.canonicalize() else {
            return Ok(()); // not there yet: it holds nothing
        };
        match self.files.iter().find(|f| f.starts_with(&target)) {
            Some(f) => Err(SettingError(format!(
                "{}: {flag} would replace a folder holding {}, which this command reads",
                out.display(),
                f.display()
            ))),
            None => Ok(()),
        }
    }
}

/// Refuses a file output whose folder does not exist, or that names a folder: checked before
/// the work, so that a mistyped path fails at once instead of after a long analysis.
pub fn check_place(flag: &str, out: &Path) -> Result<(), SettingError> {
    if out.is_dir() {
        return Err(SettingError(format!(
            "{}: {flag} names a folder, not a file",
            out.display()
        )));
    }
    let dir = folder_of(out);
    if !dir.is_dir() {
        let what = if dir.exists() {
            "is not a folder"
        } else {
            "does not exist"
        };
        return Err(SettingError(format!(
            "{}: {flag}: the folder {} {what}",
            out.display(),
            dir.display()
        )));
    }
    Ok(())
}

/// The canonical path a write to `out` replaces: `out` itself if it exists, else its
/// canonical folder joined with its name; `None` when the folder does not exist either (the
/// write fails on its own).
fn resolved(out: &Path) -> Option<PathBuf> {
    if let Ok(p) = out.canonicalize() {
        return Some(p);
    }
    let name = out.file_name()?;
    folder_of(out).canonicalize().ok().map(|d| d.join(name))
}

/// The folder a file output lands in (`.` for a bare file name).
fn folder_of(out: &Path) -> &Path {
    out.parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
}

fn external_files(g: &Graph, out: &mut Vec<PathBuf>) {
    fn push(t: &TensorData, out: &mut Vec<PathBuf>) {
        if let Some(p) = crate::import::external_path(t) {
            out.push(p.clone());
        }
    }
    for v in &g.values {
        if let Some(t) = &v.data {
            push(t, out);
        }
    }
    for n in &g.nodes {
        for a in n.attrs.iter() {
            match &a.value {
                AttrValue::Tensor(t) => push(t, out),
                AttrValue::Tensors(ts) => ts.iter().for_each(|t| push(t, out)),
                _ => {}
            }
        }
        for b in n.bodies().iter() {
            external_files(&b.graph, out);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_file_is_refused_under_any_spelling_and_other_paths_pass() {
        let d = tempfile::tempdir().expect("tmp");
        let model = d.path().join("m.onnx");
        std::fs::write(&model, b"x").expect("write");
        std::fs::create_dir(d.path().join("sub")).expect("mkdir");
        let mut r = Reads::default();
        r.add(&model);
        assert!(r.check_file("--html", &model).is_err());
        assert!(r.check_file("--html", &d.path().join("sub/../m.onnx")).is_err());
        #[cfg(unix)]
        {
            std::os::unix::fs::symlink(d.path(), d.path().join("link")).expect("symlink");
            assert!(r.check_file("--html", &d.path().join("link/m.onnx")).is_err());
        }
        assert!(r.check_file("--html", &d.path().join("report.html")).is_ok());
        // Not a file read, but nowhere to write it: refused for that, before any work.
        let e = r
            .check_file("--html", &d.path().join("no/such/dir/r.html"))
            .expect_err("no folder")
            .0;
        assert!(e.contains("does not exist"), "{e}");
        let e = r.check_file("--html", &d.path().join("sub")).expect_err("a folder").0;
        assert!(e.contains("names a folder"), "{e}");
        let e = r
            .check_file("--html", &model.join("r.html"))
            .expect_err("under a file")
            .0;
        assert!(e.contains("m.onnx is not a folder"), "{e}");
        let e = r.check_file("--junit", &model).expect_err("refused").0;
        assert!(e.contains("--junit would overwrite") && e.contains("m.onnx"), "{e}");
    }

    #[test]
    fn a_folder_holding_a_read_file_is_refused() {
        let d = tempfile::tempdir().expect("tmp");
        std::fs::create_dir_all(d.path().join("a/b")).expect("mkdir");
        let model = d.path().join("a/b/m.onnx");
        std::fs::write(&model, b"x").expect("write");
        let mut r = Reads::default();
        r.add(&model);
        for out in ["a", "a/b", "."] {
            assert!(r.check_folder("--out", &d.path().join(out)).is_err(), "{out}");
        }
        std::fs::create_dir(d.path().join("pieces")).expect("mkdir");
        assert!(r.check_folder("--out", &d.path().join("pieces")).is_ok());
        assert!(r.check_folder("--out", &d.path().join("new")).is_ok());
        // A sibling whose name shares a prefix is not a parent.
        std::fs::create_dir(d.path().join("a2")).expect("mkdir");
        assert!(r.check_folder("--out", &d.path().join("a2")).is_ok());
    }
}
