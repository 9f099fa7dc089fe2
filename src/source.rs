//! A file that the config names: on disk, or compiled into the binary (the built-in demo).
//!
//! Every stage that reads model files (the model, its labels, the self-test samples) takes a
//! [`Source`], so none of them depends on how the config found the file.

use std::path::PathBuf;

/// A file the config names, on disk or embedded in the binary.
#[derive(Debug, Clone)]
pub enum Source {
    /// A file on disk (already resolved against the config's folder).
    File(PathBuf),
    /// A file compiled into the binary (the built-in demo).
    Embedded {
        /// The path as the built-in config writes it.
        name: &'static str,
        /// The file's bytes.
        bytes: &'static [u8],
    },
    /// A folder compiled into the binary, file by file (the built-in demo's samples).
    EmbeddedDir {
        /// The path as the built-in config writes it.
        name: &'static str,
        /// File names and bytes.
        files: &'static [(&'static str, &'static [u8])],
    },
}

impl Source {
    /// Read the whole file.
    ///
    /// # Errors
    /// The I/O error, with the path.
    pub fn read(&self) -> anyhow::Result<Vec<u8>> {
        use anyhow::Context as _;
        match self {
            Source::File(p) => std::fs::read(p).with_context(|| format!("cannot read {}", p.display())),
            Source::Embedded { bytes, .. } => Ok(bytes.to_vec()),
            Source::EmbeddedDir { name, .. } => anyhow::bail!("{name} is a folder, not a file"),
        }
    }

    /// Read every file of a folder source, sorted by name (sub-folders are skipped).
    ///
    /// # Errors
    /// An unreadable folder or file, with its path.
    pub fn read_dir(&self) -> anyhow::Result<Vec<(String, Vec<u8>)>> {
        use anyhow::Context as _;
        let mut out = match self {
            Source::File(dir) => {
                let mut out = Vec::new();
                for entry in std::fs::read_dir(dir).with_context(|| format!("cannot read folder {}", dir.display()))? {
                    let path = entry.with_context(|| format!("cannot read folder {}", dir.display()))?.path();
                    if path.is_file() {
                        let bytes = std::fs::read(&path).with_context(|| format!("cannot read {}", path.display()))?;
                        out.push((path.file_name().unwrap_or_default().to_string_lossy().into_owned(), bytes));
                    }
                }
                out
            }
            Source::EmbeddedDir { files, .. } => files.iter().map(|(n, b)| (n.to_string(), b.to_vec())).collect(),
            Source::Embedded { name, .. } => anyhow::bail!("{name} is a file, not a folder"),
        };
        out.sort_by(|a, b| a.0.cmp(&b.0));
        Ok(out)
    }

    /// A name for messages.
    pub fn display(&self) -> String {
        match self {
            Source::File(p) => p.display().to_string(),
            Source::Embedded { name, .. } | Source::EmbeddedDir { name, .. } => format!("{name} (embedded)"),
        }
    }
}
