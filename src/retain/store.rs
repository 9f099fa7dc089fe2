//! The retain folder: each kept frame is `<stem>.<ext>` (the bytes as received) and
//! `<stem>.json` (its sidecar), where the stem is the arrival time in microseconds since the
//! Unix epoch (16 digits) and a counter: names sort by age. Both files are written to a
//! temporary name and renamed, the frame first, so a sidecar always has its whole frame;
//! eviction removes the sidecar first. Other files in the folder are left alone.

use std::collections::VecDeque;
use std::io::Write as _;
use std::path::{Path, PathBuf};

use super::Sidecar;

/// Prefix of files being written (left over only by a crash; removed at open).
const TEMP_PREFIX: &str = ".lineside-tmp-";

/// One kept frame: its stem, extension and size (frame + sidecar).
#[derive(Debug, Clone, PartialEq, Eq)]
struct Record {
    stem: String,
    extension: String,
    bytes: u64,
}

/// The folder, with an index of lineside's records oldest first.
#[derive(Debug)]
pub struct Store {
    dir: PathBuf,
    records: VecDeque<Record>,
    bytes: u64,
    max_frames: usize,
    max_bytes: u64,
    counter: u32,
    evicted_at_open: usize,
}

/// Whether `stem` is one of ours: 16 digits, '-', 4 to 8 hex digits.
fn is_our_stem(stem: &str) -> bool {
    let Some((time, n)) = stem.split_once('-') else { return false };
    time.len() == 16
        && time.bytes().all(|b| b.is_ascii_digit())
        && (4..=8).contains(&n.len())
        && n.bytes().all(|b| b.is_ascii_hexdigit())
}

impl Store {
    /// Open (creating it if needed) and index the folder; the bounds are applied at once.
    ///
    /// # Errors
    /// The folder cannot be created or listed.
    pub fn open(dir: &Path, max_frames: usize, max_bytes: u64) -> std::io::Result<Store> {
        std::fs::create_dir_all(dir)?;
        let mut sidecars = Vec::new();
        let mut frames = std::collections::HashMap::new();
        for entry in std::fs::read_dir(dir)? {
            let entry = entry?;
            let name = entry.file_name().to_string_lossy().into_owned();
            if name.starts_with(TEMP_PREFIX) {
                let _ = std::fs::remove_file(entry.path());
                continue;
            }
            let Some((stem, ext)) = name.rsplit_once('.') else { continue };
            if !is_our_stem(stem) || !entry.file_type()?.is_file() {
                continue;
            }
            let len = entry.metadata()?.len();
            if ext == "json" {
                sidecars.push((stem.to_owned(), len));
            } else {
                frames.insert(stem.to_owned(), (ext.to_owned(), len));
            }
        }
        sidecars.sort();
        let mut store = Store {
            dir: dir.to_owned(),
            records: VecDeque::new(),
            bytes: 0,
            max_frames,
            max_bytes,
            counter: 0,
            evicted_at_open: 0,
        };
        for (stem, json_len) in sidecars {
            // A sidecar without its frame is not a record (a person may be looking at it).
            if let Some((extension, len)) = frames.remove(&stem) {
                store.bytes += len + json_len;
                store.records.push_back(Record { stem, extension, bytes: len + json_len });
            }
        }
        // A frame without its sidecar was cut short by a crash between the two renames: it
        // would sit outside the bounds for good.
        for (stem, (extension, _)) in frames {
            remove_if_present(&dir.join(format!("{stem}.{extension}")));
        }
        store.evicted_at_open = store.evict();
        Ok(store)
    }

    /// Records removed when the folder was opened (the bounds applied to what was there).
    pub fn evicted_at_open(&self) -> usize {
        self.evicted_at_open
    }

    /// Records kept.
    pub fn frames(&self) -> usize {
        self.records.len()
    }

    /// Bytes kept (frames and sidecars).
    pub fn bytes(&self) -> u64 {
        self.bytes
    }

    /// Write one frame and its sidecar, then evict beyond the bounds; returns how many
    /// records were evicted.
    ///
    /// # Errors
    /// Writing or renaming failed (the partial files are removed).
    pub fn write(&mut self, frame: &[u8], mut sidecar: Sidecar, extension: &str) -> std::io::Result<usize> {
        let stem = self.next_stem();
        let frame_name = format!("{stem}.{extension}");
        sidecar.frame = frame_name.clone();
        sidecar.bytes = frame.len() as u64;
        let json = serde_json::to_vec_pretty(&sidecar).map_err(std::io::Error::other)?;
        self.write_atomically(&frame_name, frame)?;
        if let Err(e) = self.write_atomically(&format!("{stem}.json"), &json) {
            let _ = std::fs::remove_file(self.dir.join(&frame_name));
            return Err(e);
        }
        let bytes = (frame.len() + json.len()) as u64;
        self.bytes += bytes;
        self.records.push_back(Record { stem, extension: extension.to_owned(), bytes });
        Ok(self.evict())
    }

    fn next_stem(&mut self) -> String {
        let micros = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_micros() as u64)
            .min(9_999_999_999_999_999);
        loop {
            self.counter = self.counter.wrapping_add(1);
            let stem = format!("{micros:016}-{:04x}", self.counter & 0xffff);
            if !self.dir.join(format!("{stem}.json")).exists() {
                return stem;
            }
        }
    }

    /// Write `bytes` to `name` through a temporary file, synced, then renamed: a reader (or a
    /// power cut) never sees half a file under the final name.
    fn write_atomically(&self, name: &str, bytes: &[u8]) -> std::io::Result<()> {
        let temp = self.dir.join(format!("{TEMP_PREFIX}{name}"));
        let result = (|| {
            let mut f = std::fs::File::create(&temp)?;
            f.write_all(bytes)?;
            f.sync_all()?;
            std::fs::rename(&temp, self.dir.join(name))
        })();
        if result.is_err() {
            let _ = std::fs::remove_file(&temp);
        }
        result
    }

    /// Remove the oldest records until both bounds hold; returns how many went. A file that
    /// cannot be removed is logged and left (the index and the totals move on, so the bounds
    /// keep holding for everything else).
    fn evict(&mut self) -> usize {
        let mut evicted = 0;
        while self.records.len() > self.max_frames || (self.bytes > self.max_bytes && !self.records.is_empty()) {
            let Some(r) = self.records.pop_front() else { break };
            self.bytes = self.bytes.saturating_sub(r.bytes);
            remove_if_present(&self.dir.join(format!("{}.json", r.stem)));
            remove_if_present(&self.dir.join(format!("{}.{}", r.stem, r.extension)));
            evicted += 1;
        }
        evicted
    }
}

fn remove_if_present(path: &Path) {
    if let Err(e) = std::fs::remove_file(path)
        && e.kind() != std::io::ErrorKind::NotFound
    {
        tracing::warn!(path = %path.display(), cause = %e, "cannot remove an old retained file");
    }
}

/// Every record of a folder, oldest first: (frame path, sidecar) for each sidecar that parses
/// and has its frame. Sidecars that do not parse are counted in the second value.
///
/// # Errors
/// The folder cannot be listed.
pub fn read_all(dir: &Path) -> std::io::Result<(Vec<(PathBuf, Sidecar)>, usize)> {
    // Frame names come from the folder's listing, never from the sidecar (which a person
    // edits): a sidecar cannot point outside the folder.
    let (mut stems, mut frames) = (Vec::new(), std::collections::HashMap::new());
    for entry in std::fs::read_dir(dir)?.filter_map(Result::ok) {
        let Some(name) = entry.file_name().to_str().map(str::to_owned) else { continue };
        let Some((stem, ext)) = name.rsplit_once('.') else { continue };
        if !is_our_stem(stem) {
            continue;
        }
        if ext == "json" {
            stems.push(stem.to_owned());
        } else if entry.file_type().is_ok_and(|t| t.is_file()) {
            frames.insert(stem.to_owned(), name);
        }
    }
    stems.sort();
    let (mut records, mut unreadable) = (Vec::new(), 0);
    for stem in stems {
        let parsed = std::fs::read(dir.join(format!("{stem}.json")))
            .ok()
            .and_then(|b| serde_json::from_slice::<Sidecar>(&b).ok())
            .filter(|s| s.format == super::FORMAT);
        match (parsed, frames.remove(&stem)) {
            (Some(mut s), Some(frame)) => {
                s.frame = frame;
                records.push((dir.join(&s.frame), s));
            }
            _ => unreadable += 1,
        }
    }
    Ok((records, unreadable))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::retain::{FORMAT, Reason};

    pub(crate) fn sidecar(label: &str) -> Sidecar {
        Sidecar {
            format: FORMAT.into(),
            format_version: 1,
            frame: String::new(),
            bytes: 0,
            request_id: "r1".into(),
            part_id: Some("P-1".into()),
            camera_id: None,
            multipart: None,
            received_at: "2026-12-03T10:00:00.000Z".into(),
            model: "washers".into(),
            version: "abc".into(),
            label: label.into(),
            score: 0.5,
            top: Vec::new(),
            verdict: None,
            kept_because: Reason::Label,
            timing_ms: serde_json::json!({}),
            confirmed: None,
        }
    }

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("lineside-store-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    #[test]
    fn both_bounds_hold_and_survive_a_reopen_and_strangers_stay() {
        let d = dir("bounds");
        std::fs::create_dir_all(&d).unwrap();
        std::fs::write(d.join("notes.txt"), "the line's own file").unwrap();
        std::fs::write(d.join(format!("{TEMP_PREFIX}0000000000000001-0001.png")), "half").unwrap();
        let mut s = Store::open(&d, 3, 1_000_000).unwrap();
        for i in 0..5 {
            s.write(&[i; 100], sidecar("burr"), "png").unwrap();
        }
        assert_eq!(s.frames(), 3);
        let (records, unreadable) = read_all(&d).unwrap();
        assert_eq!((records.len(), unreadable), (3, 0));
        // The newest three: the frames written with bytes 2, 3, 4.
        let firsts: Vec<u8> = records.iter().map(|(p, _)| std::fs::read(p).unwrap()[0]).collect();
        assert_eq!(firsts, [2, 3, 4]);
        assert!(d.join("notes.txt").exists(), "a file that is not lineside's stays");
        assert!(!d.join(format!("{TEMP_PREFIX}0000000000000001-0001.png")).exists(), "a crash's temp file goes");
        // Reopened with a byte bound smaller than two records: only the newest one stays.
        let per_record = s.bytes() / 3;
        let s = Store::open(&d, 10, per_record + per_record / 2).unwrap();
        assert_eq!((s.frames(), s.evicted_at_open()), (1, 2));
        let (records, _) = read_all(&d).unwrap();
        assert_eq!(std::fs::read(&records[0].0).unwrap()[0], 4);
        assert_eq!(records[0].1.bytes, 100);
    }

    #[test]
    fn a_sidecar_without_its_frame_is_not_a_record_and_a_frame_without_its_sidecar_goes() {
        let d = dir("orphan");
        let mut s = Store::open(&d, 10, 1_000_000).unwrap();
        s.write(b"\x89PNG....", sidecar("good"), "png").unwrap();
        s.write(b"\x89PNG....", sidecar("burr"), "png").unwrap();
        let (records, _) = read_all(&d).unwrap();
        std::fs::remove_file(&records[0].0).unwrap();
        let lone_frame = records[1].0.clone();
        std::fs::remove_file(lone_frame.with_extension("json")).unwrap();
        assert_eq!(Store::open(&d, 10, 1_000_000).unwrap().frames(), 0);
        assert_eq!(read_all(&d).unwrap(), (Vec::new(), 1));
        assert!(!lone_frame.exists(), "a frame cut off from its sidecar by a crash is removed");
    }

    #[test]
    fn a_sidecar_cannot_point_outside_the_folder() {
        let d = dir("escape");
        let mut s = Store::open(&d, 10, 1_000_000).unwrap();
        s.write(b"\x89PNG....", sidecar("good"), "png").unwrap();
        let (records, _) = read_all(&d).unwrap();
        let json = records[0].0.with_extension("json");
        let mut side: Sidecar = serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap();
        side.frame = "../../etc/passwd".into();
        std::fs::write(&json, serde_json::to_vec(&side).unwrap()).unwrap();
        let (records, _) = read_all(&d).unwrap();
        assert_eq!(records[0].0, d.join(records[0].1.frame.as_str()));
        assert!(is_our_stem(records[0].1.frame.split('.').next().unwrap()), "{}", records[0].1.frame);
    }

    #[test]
    fn only_our_names_count() {
        assert!(is_our_stem("1796292077000000-0001"));
        assert!(!is_our_stem("1796292077000000"));
        assert!(!is_our_stem("17962920770000001-0001"));
        assert!(!is_our_stem("frame-0001"));
    }
}
