//! `lineside retained export`: the frames a person has confirmed, as one folder per true
//! class (the layout `lineside evaluate` reads), with a summary.

use std::collections::BTreeMap;
use std::path::Path;

use serde::Serialize;

/// What an export did.
#[derive(Debug, Default, Serialize, PartialEq, Eq)]
pub struct Summary {
    /// Frames copied, by confirmed class.
    pub exported: BTreeMap<String, usize>,
    /// Frames kept but not confirmed yet.
    pub unconfirmed: usize,
    /// Confirmed with a label that cannot be a folder name (empty, `.`, `..`, a slash).
    pub bad_label: usize,
    /// Sidecars that do not parse or whose frame is missing.
    pub unreadable: usize,
    /// Confirmed frames whose label and model answer differ (the model was wrong).
    pub corrected: usize,
    /// Confirmed with a label the model does not have (a typo would otherwise be a new class).
    pub unknown_label: BTreeMap<String, usize>,
}

impl Summary {
    /// Frames copied in all.
    pub fn total(&self) -> usize {
        self.exported.values().sum()
    }
}

fn folder_name_ok(label: &str) -> bool {
    !label.is_empty() && label != "." && label != ".." && !label.contains(['/', '\\', '\0'])
}

/// Copy every confirmed frame in `dir` to `out/<confirmed>/<frame>`. Exports are repeatable:
/// a copy of the same frame in another class folder (its label was changed since) is removed.
/// With `labels`, a confirmed label outside them is counted and skipped.
///
/// # Errors
/// The folder cannot be read, or `out` cannot be written (the message names the path).
pub fn export(dir: &Path, out: &Path, labels: Option<&[String]>) -> Result<Summary, String> {
    let (records, unreadable) =
        super::store::read_all(dir).map_err(|e| format!("cannot read the retain folder {}: {e}", dir.display()))?;
    let mut summary = Summary { unreadable, ..Summary::default() };
    for (frame, sidecar) in records {
        let Some(label) = sidecar.confirmed.as_deref() else {
            summary.unconfirmed += 1;
            continue;
        };
        if !folder_name_ok(label) {
            summary.bad_label += 1;
            continue;
        }
        if labels.is_some_and(|known| !known.iter().any(|l| l == label)) {
            *summary.unknown_label.entry(label.to_owned()).or_default() += 1;
            continue;
        }
        remove_stale_copies(out, label, &sidecar.frame)?;
        let class_dir = out.join(label);
        std::fs::create_dir_all(&class_dir).map_err(|e| format!("cannot create {}: {e}", class_dir.display()))?;
        let target = class_dir.join(&sidecar.frame);
        std::fs::copy(&frame, &target)
            .map_err(|e| format!("cannot copy {} to {}: {e}", frame.display(), target.display()))?;
        *summary.exported.entry(label.to_owned()).or_default() += 1;
        if label != sidecar.label {
            summary.corrected += 1;
        }
    }
    Ok(summary)
}

/// Remove `frame` from every class folder of `out` but `label`'s.
fn remove_stale_copies(out: &Path, label: &str, frame: &str) -> Result<(), String> {
    let Ok(entries) = std::fs::read_dir(out) else { return Ok(()) };
    for entry in entries.filter_map(Result::ok) {
        let stale = entry.path().join(frame);
        if entry.file_name() != label && stale.is_file() {
            std::fs::remove_file(&stale)
                .map_err(|e| format!("cannot remove the stale copy {}: {e}", stale.display()))?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::retain::store::Store;

    #[test]
    fn confirmed_frames_land_in_their_class_folder() {
        let base = std::env::temp_dir().join(format!("lineside-export-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&base);
        let (dir, out) = (base.join("retained"), base.join("out"));
        let mut s = Store::open(&dir, 100, 1 << 20).unwrap();
        for (label, confirmed) in [
            ("burr", Some("burr")),
            ("good", Some("cracked")),
            ("good", None),
            ("x", Some("../up")),
            ("good", Some("craked")),
        ] {
            let mut side = crate::retain::store::tests::sidecar(label);
            side.confirmed = confirmed.map(String::from);
            s.write(b"\x89PNG", side, "png").unwrap();
        }
        let labels: Vec<String> = ["good", "burr", "cracked"].map(String::from).to_vec();
        let summary = export(&dir, &out, Some(&labels)).unwrap();
        assert_eq!(summary.unknown_label, BTreeMap::from([("craked".into(), 1)]));
        assert_eq!(summary.exported, BTreeMap::from([("burr".into(), 1), ("cracked".into(), 1)]));
        assert_eq!((summary.unconfirmed, summary.bad_label, summary.corrected, summary.total()), (1, 1, 1, 2));
        assert_eq!(std::fs::read_dir(out.join("cracked")).unwrap().count(), 1);
        assert!(!base.join("up").exists());
        // Again: the same result, nothing doubled.
        assert_eq!(export(&dir, &out, Some(&labels)).unwrap(), summary);
        assert_eq!(std::fs::read_dir(out.join("burr")).unwrap().count(), 1);
        // The burr frame relabelled cracked: it moves, it is not in two classes.
        let (records, _) = crate::retain::store::read_all(&dir).unwrap();
        let (_, burr) = records.iter().find(|(_, s)| s.label == "burr").unwrap();
        let json = dir.join(burr.frame.replace(".png", ".json"));
        let mut side = burr.clone();
        side.confirmed = Some("cracked".into());
        std::fs::write(&json, serde_json::to_vec(&side).unwrap()).unwrap();
        export(&dir, &out, Some(&labels)).unwrap();
        assert_eq!(std::fs::read_dir(out.join("burr")).unwrap().count(), 0);
        assert_eq!(std::fs::read_dir(out.join("cracked")).unwrap().count(), 2);
    }
}
