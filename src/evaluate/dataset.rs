//! The labelled frames `evaluate` reads: a folder with one sub-folder per class (named as in
//! the labels file), or a CSV file with the header `file,label` (paths relative to the CSV).
//! Only the paths are held (a few hundred bytes a frame); the frames are read one at a time
//! as they are scored, so folders of tens of thousands stream with bounded memory.

use std::path::{Path, PathBuf};

use anyhow::{Context as _, bail};

/// One labelled frame.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Item {
    /// Where to read it.
    pub path: PathBuf,
    /// Its name as reported: relative to the folder (or to the CSV's folder), `/`-separated.
    pub file: String,
    /// Index of its true label in the labels file.
    pub truth: usize,
}

/// The frames of a set, in a stable order (class by class, then by file name; a CSV's rows
/// in its order).
#[derive(Debug, Clone)]
pub struct Dataset {
    /// Where the set was read from.
    pub root: PathBuf,
    /// The frames.
    pub items: Vec<Item>,
    /// Classes with no frame in the set.
    pub absent: Vec<String>,
}

impl Dataset {
    /// Read the set at `path` (a folder of class folders, or a CSV file) for `labels`.
    ///
    /// # Errors
    /// The path cannot be read; a sub-folder or CSV label that is not a class (the message
    /// lists the classes); a CSV without the `file,label` header or with a malformed row.
    pub fn open(path: &Path, labels: &[String]) -> anyhow::Result<Dataset> {
        let items = if path.is_dir() {
            from_folders(path, labels)?
        } else if path.extension().is_some_and(|e| e.eq_ignore_ascii_case("csv")) {
            from_csv(path, labels)?
        } else if path.exists() {
            bail!(
                "{}: expected a folder with one sub-folder per class, or a CSV file with a header `file,label`",
                path.display()
            );
        } else {
            bail!("{}: no such folder or CSV file", path.display());
        };
        let absent = labels
            .iter()
            .enumerate()
            .filter(|(i, _)| !items.iter().any(|it| it.truth == *i))
            .map(|(_, l)| l.clone())
            .collect();
        Ok(Dataset { root: path.to_path_buf(), items, absent })
    }
}

/// The folder a set's `file` names are relative to: the set itself, or a CSV's folder.
pub fn base_of(set: &Path) -> &Path {
    if set.is_dir() { set } else { set.parent().unwrap_or(Path::new(".")) }
}

fn not_a_class(what: &str, name: &str, labels: &[String]) -> anyhow::Error {
    anyhow::anyhow!(
        "{what} {name:?} is not a class of this model; its classes (labels file order) are: {}",
        labels.join(", ")
    )
}

fn from_folders(root: &Path, labels: &[String]) -> anyhow::Result<Vec<Item>> {
    let mut classes = Vec::new();
    for entry in std::fs::read_dir(root).with_context(|| format!("cannot read the folder {}", root.display()))? {
        let entry = entry.with_context(|| format!("cannot read the folder {}", root.display()))?;
        let name = entry.file_name().to_string_lossy().into_owned();
        if name.starts_with('.') || !entry.path().is_dir() {
            continue; // hidden entries, and files beside the class folders (a README)
        }
        let truth = labels
            .iter()
            .position(|l| *l == name)
            .ok_or_else(|| not_a_class(&format!("the folder {}: sub-folder", root.display()), &name, labels))?;
        classes.push((truth, name, entry.path()));
    }
    if classes.is_empty() {
        bail!(
            "{}: no class sub-folders; expected one sub-folder per class, named as the labels file names them: {}",
            root.display(),
            labels.join(", ")
        );
    }
    classes.sort();
    let mut items = Vec::new();
    for (truth, name, dir) in classes {
        let mut files = Vec::new();
        walk(&dir, &mut files).with_context(|| format!("cannot read the folder {}", dir.display()))?;
        files.sort();
        for path in files {
            let rel = path.strip_prefix(root).unwrap_or(&path);
            let file = rel.components().map(|c| c.as_os_str().to_string_lossy()).collect::<Vec<_>>().join("/");
            debug_assert!(file.starts_with(&name));
            items.push(Item { path, file, truth });
        }
    }
    Ok(items)
}

/// Every non-hidden file under `dir`, recursively. Links to files are followed; links to
/// folders are not (a link loop would never end).
fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> std::io::Result<()> {
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        if entry.file_name().to_string_lossy().starts_with('.') {
            continue;
        }
        let (kind, path) = (entry.file_type()?, entry.path());
        if kind.is_dir() {
            walk(&path, out)?;
        } else if kind.is_file() || (kind.is_symlink() && path.is_file()) {
            out.push(path);
        }
    }
    Ok(())
}

fn from_csv(csv: &Path, labels: &[String]) -> anyhow::Result<Vec<Item>> {
    let text = std::fs::read_to_string(csv).with_context(|| format!("cannot read {}", csv.display()))?;
    // Spreadsheets' "CSV UTF-8" starts with a byte-order mark.
    let text = text.strip_prefix('\u{feff}').unwrap_or(&text);
    let base = base_of(csv);
    let mut lines = text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty());
    match lines.next() {
        Some((_, header)) if split(header).as_deref() == Some(&["file".to_string(), "label".to_string()][..]) => {}
        other => bail!(
            "{}: the first line must be the header `file,label`, found {:?}",
            csv.display(),
            other.map(|(_, l)| l).unwrap_or("nothing")
        ),
    }
    let mut items = Vec::new();
    for (i, line) in lines {
        let at = || format!("{} line {}", csv.display(), i + 1);
        let fields = split(line).ok_or_else(|| anyhow::anyhow!("{}: unbalanced quotes in {line:?}", at()))?;
        let [file, label] = fields.as_slice() else {
            bail!("{}: expected two fields `file,label`, found {}: {line:?}", at(), fields.len());
        };
        let truth = labels
            .iter()
            .position(|l| l == label)
            .ok_or_else(|| not_a_class(&format!("{}: label", at()), label, labels))?;
        items.push(Item { path: base.join(file), file: file.clone(), truth });
    }
    Ok(items)
}

/// One CSV record's fields (RFC 4180: fields may be quoted, a quote inside is doubled). `None`
/// for an unterminated quote.
fn split(line: &str) -> Option<Vec<String>> {
    let mut fields = Vec::new();
    let mut field = String::new();
    let mut chars = line.trim_end_matches('\r').chars().peekable();
    let mut quoted = false;
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                field.push('"');
                chars.next();
            }
            ('"', true) => quoted = false,
            ('"', false) if field.is_empty() => quoted = true,
            (',', false) => fields.push(std::mem::take(&mut field)),
            (c, _) => field.push(c),
        }
    }
    if quoted {
        return None;
    }
    fields.push(field);
    Some(fields.into_iter().map(|f| f.trim().to_string()).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_fields_follow_rfc_4180_quoting() {
        assert_eq!(split("a.png,good").unwrap(), ["a.png", "good"]);
        assert_eq!(split("\"a, b.png\",good").unwrap(), ["a, b.png", "good"]);
        assert_eq!(split("\"say \"\"hi\"\".png\",burr\r").unwrap(), ["say \"hi\".png", "burr"]);
        assert!(split("\"open,good").is_none());
    }

    #[test]
    fn folders_and_csv_give_items_and_unknown_classes_are_refused() {
        let labels: Vec<String> = ["good", "burr", "empty"].map(String::from).to_vec();
        let dir = std::env::temp_dir().join(format!("lineside-dataset-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        for f in ["good/b.png", "good/a.png", "burr/x/c.png"] {
            let p = dir.join(f);
            std::fs::create_dir_all(p.parent().unwrap()).unwrap();
            std::fs::write(p, b"").unwrap();
        }
        std::fs::write(dir.join("README.txt"), b"notes").unwrap();
        let set = Dataset::open(&dir, &labels).unwrap();
        let got: Vec<(&str, usize)> = set.items.iter().map(|i| (i.file.as_str(), i.truth)).collect();
        assert_eq!(got, [("good/a.png", 0), ("good/b.png", 0), ("burr/x/c.png", 1)]);
        assert_eq!(set.absent, ["empty"]);

        std::fs::write(dir.join("set.csv"), "\u{feff}file,label\ngood/a.png,good\n\"burr/x/c.png\",burr\n").unwrap();
        let set = Dataset::open(&dir.join("set.csv"), &labels).unwrap();
        assert_eq!(set.items[1].path, dir.join("burr/x/c.png"));
        assert_eq!(set.absent, ["empty"]);

        std::fs::write(dir.join("bad.csv"), "file,label\ngood/a.png,scratched\n").unwrap();
        let e = Dataset::open(&dir.join("bad.csv"), &labels).unwrap_err().to_string();
        assert!(e.contains("line 2") && e.contains("\"scratched\"") && e.contains("good, burr, empty"), "{e}");
        std::fs::create_dir_all(dir.join("dented")).unwrap();
        let e = Dataset::open(&dir, &labels).unwrap_err().to_string();
        assert!(e.contains("\"dented\"") && e.contains("good, burr, empty"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
