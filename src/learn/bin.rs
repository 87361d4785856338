//! A parts bin on disk: `BIN/<part type>/<scan>.ply|.xyz|.pcd`, and the two label fixes the
//! Review tab offers (move a scan to another type, set it aside), each undoable.

use std::fmt;
use std::fs;
use std::io;
use std::path::{Path, PathBuf};

/// Types with fewer scans than this are warned about (common practice, no source: fewer than a
/// handful of examples per class rarely gives a usable holdout split).
pub const MIN_SCANS_PER_TYPE: usize = 5;

/// The bin is called imbalanced when its largest type has more than this many times the scans
/// of its smallest (common practice, no source).
pub const IMBALANCE_RATIO: f64 = 3.0;

/// The hidden folder of the bin that set-aside scans go to, one sub-folder per type they came from.
pub const SET_ASIDE_FOLDER: &str = ".set-aside";

/// File extensions read as scans, compared without regard to case.
const SCAN_EXTENSIONS: [&str; 3] = ["ply", "xyz", "pcd"];

/// One scan of the bin and the index of its part type in [`PartsBin::part_types`].
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LabelledScan {
    pub path: PathBuf,
    pub label: usize,
}

/// A parts bin as found on disk. `part_types` are the names of the sub-folders that hold at least
/// one scan, sorted by name; `scans` are sorted by type, then by file name, so the order (and so
/// every seeded split) is the same on every machine.
#[derive(Clone, Debug, PartialEq)]
pub struct PartsBin {
    pub root: PathBuf,
    pub part_types: Vec<String>,
    pub scans: Vec<LabelledScan>,
    /// Sub-folders that were not taken as part types, and why.
    pub skipped_folders: Vec<(PathBuf, SkipReason)>,
}

/// Why a sub-folder of the bin is not a part type.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SkipReason {
    /// It holds no `.ply`, `.xyz` or `.pcd` file.
    NoScans,
    /// Its name is not valid UTF-8, so it cannot name a part type.
    NameNotUtf8,
}

/// Something the user should know about a bin before teaching on it.
#[derive(Clone, Debug, PartialEq)]
pub enum BinWarning {
    FewScans {
        part_type: String,
        count: usize,
    },
    Imbalance {
        largest: String,
        largest_count: usize,
        smallest: String,
        smallest_count: usize,
    },
    SkippedFolder {
        path: PathBuf,
        reason: SkipReason,
    },
}

impl fmt::Display for BinWarning {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            BinWarning::FewScans { part_type, count } => write!(
                f,
                "part type '{part_type}' has only {count} scan(s); at least {MIN_SCANS_PER_TYPE} are advised"
            ),
            BinWarning::Imbalance {
                largest,
                largest_count,
                smallest,
                smallest_count,
            } => write!(
                f,
                "the bin is imbalanced: '{largest}' has {largest_count} scans, '{smallest}' only \
                 {smallest_count} (more than {IMBALANCE_RATIO}x)"
            ),
            BinWarning::SkippedFolder { path, reason } => {
                let why = match reason {
                    SkipReason::NoScans => "it holds no .ply, .xyz or .pcd file",
                    SkipReason::NameNotUtf8 => "its name is not valid UTF-8",
                };
                write!(f, "folder {} is not used as a part type: {why}", path.display())
            }
        }
    }
}

/// A bin that cannot be read, or a label fix that cannot be made.
#[derive(Debug, thiserror::Error)]
pub enum BinError {
    #[error("{path}: not a folder", path = .path.display())]
    NotAFolder { path: PathBuf },
    #[error("{path}: {source}", path = .path.display())]
    Io { path: PathBuf, source: io::Error },
    #[error("{path}: no part-type sub-folders (a parts bin holds one sub-folder per part type)", path = .path.display())]
    NoPartTypes { path: PathBuf },
    #[error("{path}: no scans (.ply, .xyz or .pcd) in any part-type sub-folder", path = .path.display())]
    NoScans { path: PathBuf },
    #[error("{path}: not a scan of this parts bin", path = .path.display())]
    NotInBin { path: PathBuf },
    #[error("'{name}' cannot name a part type (it must be one plain folder name, not hidden)")]
    BadTypeName { name: String },
    #[error("{path}: already of part type '{part_type}'", path = .path.display())]
    SameType { path: PathBuf, part_type: String },
    #[error("cannot move {from} to {to}: {source}", from = .from.display(), to = .to.display())]
    Move {
        from: PathBuf,
        to: PathBuf,
        source: io::Error,
    },
}

/// A move made by [`PartsBin::move_scan`] or [`PartsBin::set_aside`]; [`MoveRecord::undo`] moves
/// the scan back.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct MoveRecord {
    pub from: PathBuf,
    pub to: PathBuf,
}

/// Reads the parts bin at `root`: every direct sub-folder that is not hidden is a part type,
/// every direct file in it with a `.ply`, `.xyz` or `.pcd` extension (any case) that is not
/// hidden is a scan. Other files, hidden files and deeper folders are ignored. Symbolic links are
/// followed. The files are only listed here, not read.
///
/// Errors: `root` is not a folder, cannot be listed, has no sub-folder, or no sub-folder holds a scan.
pub fn scan_bin(root: &Path) -> Result<PartsBin, BinError> {
    if !root.is_dir() {
        return Err(BinError::NotAFolder {
            path: root.to_path_buf(),
        });
    }
    let mut part_types = Vec::new();
    let mut scans = Vec::new();
    let mut skipped_folders = Vec::new();
    let folders = visible_entries(root, |p| p.is_dir())?;
    if folders.is_empty() {
        return Err(BinError::NoPartTypes {
            path: root.to_path_buf(),
        });
    }
    for folder in folders {
        let Some(name) = folder.file_name().and_then(|n| n.to_str()) else {
            skipped_folders.push((folder, SkipReason::NameNotUtf8));
            continue;
        };
        let files = visible_entries(&folder, |p| p.is_file() && is_scan_file(p))?;
        if files.is_empty() {
            skipped_folders.push((folder, SkipReason::NoScans));
            continue;
        }
        let label = part_types.len();
        part_types.push(name.to_owned());
        scans.extend(files.into_iter().map(|path| LabelledScan { path, label }));
    }
    if scans.is_empty() {
        return Err(BinError::NoScans {
            path: root.to_path_buf(),
        });
    }
    Ok(PartsBin {
        root: root.to_path_buf(),
        part_types,
        scans,
        skipped_folders,
    })
}

/// The entries of `dir` whose names do not start with '.' and that pass `keep`, sorted by name.
fn visible_entries(dir: &Path, keep: impl Fn(&Path) -> bool) -> Result<Vec<PathBuf>, BinError> {
    let io_error = |source| BinError::Io {
        path: dir.to_path_buf(),
        source,
    };
    let mut paths = Vec::new();
    for entry in fs::read_dir(dir).map_err(io_error)? {
        let path = entry.map_err(io_error)?.path();
        let hidden = path
            .file_name()
            .is_some_and(|n| n.as_encoded_bytes().starts_with(b"."));
        if !hidden && keep(&path) {
            paths.push(path);
        }
    }
    paths.sort();
    Ok(paths)
}

fn is_scan_file(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| SCAN_EXTENSIONS.iter().any(|s| e.eq_ignore_ascii_case(s)))
}

impl PartsBin {
    /// Number of scans of each part type, in the order of `part_types`.
    pub fn counts(&self) -> Vec<usize> {
        let mut counts = vec![0; self.part_types.len()];
        for scan in &self.scans {
            counts[scan.label] += 1;
        }
        counts
    }

    /// Types with fewer than [`MIN_SCANS_PER_TYPE`] scans, an imbalance beyond
    /// [`IMBALANCE_RATIO`] between the largest and the smallest type, and skipped folders.
    pub fn warnings(&self) -> Vec<BinWarning> {
        let counts = self.counts();
        let mut warnings: Vec<BinWarning> = self
            .part_types
            .iter()
            .zip(&counts)
            .filter(|&(_, &count)| count < MIN_SCANS_PER_TYPE)
            .map(|(name, &count)| BinWarning::FewScans {
                part_type: name.clone(),
                count,
            })
            .collect();
        // First of equals, so the message names types deterministically.
        let largest = (0..counts.len()).rev().max_by_key(|&t| counts[t]);
        let smallest = (0..counts.len()).min_by_key(|&t| counts[t]);
        if let (Some(l), Some(s)) = (largest, smallest) {
            if counts[l] as f64 > IMBALANCE_RATIO * counts[s] as f64 {
                warnings.push(BinWarning::Imbalance {
                    largest: self.part_types[l].clone(),
                    largest_count: counts[l],
                    smallest: self.part_types[s].clone(),
                    smallest_count: counts[s],
                });
            }
        }
        warnings.extend(self.skipped_folders.iter().map(|(path, reason)| {
            BinWarning::SkippedFolder {
                path: path.clone(),
                reason: *reason,
            }
        }));
        warnings
    }

    /// Moves the scan at `scan` (one of `self.scans`) into the folder of part type `to_type`,
    /// creating that folder if it is a new type. An existing file is never overwritten: a name
    /// taken in the target folder becomes `name-2.ext`, `name-3.ext`, ...
    /// `self` is not changed: read the bin again with [`scan_bin`] to see the new counts.
    ///
    /// Errors: `scan` is not a scan of this bin, `to_type` is its own type or not a plain
    /// visible folder name, or the file system refuses.
    pub fn move_scan(&self, scan: &Path, to_type: &str) -> Result<MoveRecord, BinError> {
        let current = self.type_of(scan)?;
        if !is_plain_visible_name(to_type) {
            return Err(BinError::BadTypeName {
                name: to_type.to_owned(),
            });
        }
        if current == to_type {
            return Err(BinError::SameType {
                path: scan.to_path_buf(),
                part_type: to_type.to_owned(),
            });
        }
        move_into(scan, &self.root.join(to_type))
    }

    /// Moves the scan at `scan` (one of `self.scans`) out of training, into
    /// `BIN/.set-aside/<its part type>/` (which [`scan_bin`] ignores), never overwriting.
    /// `self` is not changed. Errors as for [`PartsBin::move_scan`].
    pub fn set_aside(&self, scan: &Path) -> Result<MoveRecord, BinError> {
        let current = self.type_of(scan)?;
        move_into(scan, &self.root.join(SET_ASIDE_FOLDER).join(current))
    }

    fn type_of(&self, scan: &Path) -> Result<&str, BinError> {
        self.scans
            .iter()
            .find(|s| s.path == scan)
            .map(|s| self.part_types[s.label].as_str())
            .ok_or_else(|| BinError::NotInBin {
                path: scan.to_path_buf(),
            })
    }
}

impl MoveRecord {
    /// Moves the scan back where it was. Never overwrites: if a file has since taken the old
    /// name, this fails and both files stay as they are.
    pub fn undo(&self) -> Result<(), BinError> {
        rename_no_clobber(&self.to, &self.from).map_err(|source| BinError::Move {
            from: self.to.clone(),
            to: self.from.clone(),
            source,
        })
    }
}

pub(crate) fn is_plain_visible_name(name: &str) -> bool {
    let mut components = Path::new(name).components();
    matches!(
        (components.next(), components.next()),
        (Some(std::path::Component::Normal(_)), None)
    ) && !name.starts_with('.')
        && !name.contains(['/', '\\'])
}

/// Moves `file` into `folder` (created if missing) under its own name or the first free
/// `stem-N.ext`.
pub(crate) fn move_into(file: &Path, folder: &Path) -> Result<MoveRecord, BinError> {
    let failed = |to: &Path, source| BinError::Move {
        from: file.to_path_buf(),
        to: to.to_path_buf(),
        source,
    };
    fs::create_dir_all(folder).map_err(|e| failed(folder, e))?;
    let name = file.file_name().unwrap_or_default();
    let stem = Path::new(name)
        .file_stem()
        .unwrap_or_default()
        .to_string_lossy();
    let extension = Path::new(name)
        .extension()
        .map(|e| format!(".{}", e.to_string_lossy()))
        .unwrap_or_default();
    let mut to = folder.join(name);
    for n in 2.. {
        match rename_no_clobber(file, &to) {
            Ok(()) => break,
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => {
                to = folder.join(format!("{stem}-{n}{extension}"));
            }
            Err(e) => return Err(failed(&to, e)),
        }
    }
    Ok(MoveRecord {
        from: file.to_path_buf(),
        to,
    })
}

/// Renames `from` to `to`, failing with `AlreadyExists` rather than replacing a file at `to`.
/// A hard link refuses an existing target atomically; where the file system has no hard links
/// (FAT on a memory stick), a check before the rename has to do.
fn rename_no_clobber(from: &Path, to: &Path) -> io::Result<()> {
    match fs::hard_link(from, to) {
        Ok(()) => fs::remove_file(from).inspect_err(|_| {
            let _ = fs::remove_file(to);
        }),
        Err(e) if e.kind() == io::ErrorKind::AlreadyExists => Err(e),
        Err(_) => {
            if fs::symlink_metadata(to).is_ok() {
                return Err(io::Error::from(io::ErrorKind::AlreadyExists));
            }
            fs::rename(from, to)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A fresh, empty folder under the system temp folder, removed when dropped.
    struct TempDir(PathBuf);
    impl TempDir {
        fn new(tag: &str) -> Self {
            let dir = std::env::temp_dir().join(format!(
                "partsift-bin-{tag}-{}-{:?}",
                std::process::id(),
                std::thread::current().id()
            ));
            let _ = fs::remove_dir_all(&dir);
            fs::create_dir_all(&dir).unwrap();
            TempDir(dir)
        }
    }
    impl Drop for TempDir {
        fn drop(&mut self) {
            let _ = fs::remove_dir_all(&self.0);
        }
    }

    fn touch(root: &Path, relative: &str) -> PathBuf {
        let path = root.join(relative);
        fs::create_dir_all(path.parent().unwrap()).unwrap();
        fs::write(&path, relative.as_bytes()).unwrap();
        path
    }

    fn names(bin: &PartsBin) -> Vec<String> {
        bin.scans
            .iter()
            .map(|s| {
                format!(
                    "{}:{}",
                    bin.part_types[s.label],
                    s.path.file_name().unwrap().to_string_lossy()
                )
            })
            .collect()
    }

    #[test]
    fn reads_types_and_scans_in_name_order_and_ignores_the_rest() {
        let dir = TempDir::new("read");
        for f in [
            "washer/b.PLY",
            "washer/a.xyz",
            "washer/.hidden.ply",
            "washer/notes.txt",
            "washer/deeper/c.ply",
            "bolt/z.pcd",
            "bolt/y.Xyz",
            ".set-aside/bolt/x.ply",
            "empty/readme.md",
            "top-level.ply",
        ] {
            touch(&dir.0, f);
        }
        let bin = scan_bin(&dir.0).unwrap();
        assert_eq!(bin.part_types, ["bolt", "washer"]);
        assert_eq!(
            names(&bin),
            ["bolt:y.Xyz", "bolt:z.pcd", "washer:a.xyz", "washer:b.PLY"]
        );
        assert_eq!(
            bin.skipped_folders,
            [(dir.0.join("empty"), SkipReason::NoScans)]
        );
        assert_eq!(bin.counts(), [2, 2]);
    }

    #[test]
    fn unusable_bins_say_why() {
        let dir = TempDir::new("errors");
        let file = touch(&dir.0, "a.ply");
        assert!(matches!(scan_bin(&file), Err(BinError::NotAFolder { .. })));
        assert!(matches!(
            scan_bin(&dir.0.join("missing")),
            Err(BinError::NotAFolder { .. })
        ));
        assert!(matches!(
            scan_bin(&dir.0),
            Err(BinError::NoPartTypes { .. })
        ));
        touch(&dir.0, "bolt/readme.txt");
        let err = scan_bin(&dir.0).unwrap_err();
        assert!(matches!(err, BinError::NoScans { .. }));
        assert!(err.to_string().contains(&dir.0.display().to_string()));
    }

    #[test]
    fn warns_about_few_scans_imbalance_and_skipped_folders() {
        let dir = TempDir::new("warn");
        for i in 0..13 {
            touch(&dir.0, &format!("bolt/{i:02}.ply"));
        }
        for i in 0..4 {
            touch(&dir.0, &format!("nut/{i}.ply"));
        }
        for i in 0..5 {
            touch(&dir.0, &format!("washer/{i}.ply"));
        }
        fs::create_dir_all(dir.0.join("spacer")).unwrap();
        let bin = scan_bin(&dir.0).unwrap();
        assert_eq!(
            bin.warnings(),
            [
                BinWarning::FewScans {
                    part_type: "nut".into(),
                    count: 4
                },
                BinWarning::Imbalance {
                    largest: "bolt".into(),
                    largest_count: 13,
                    smallest: "nut".into(),
                    smallest_count: 4
                },
                BinWarning::SkippedFolder {
                    path: dir.0.join("spacer"),
                    reason: SkipReason::NoScans
                },
            ]
        );
        // Exactly 3x is not yet imbalanced.
        fs::remove_file(dir.0.join("bolt/12.ply")).unwrap();
        let bin = scan_bin(&dir.0).unwrap();
        assert!(!bin
            .warnings()
            .iter()
            .any(|w| matches!(w, BinWarning::Imbalance { .. })));
    }

    #[test]
    fn move_never_overwrites_and_undo_restores() {
        let dir = TempDir::new("move");
        let scan = touch(&dir.0, "bolt/a.ply");
        touch(&dir.0, "washer/a.ply");
        touch(&dir.0, "washer/a-2.ply");
        let bin = scan_bin(&dir.0).unwrap();
        let record = bin.move_scan(&scan, "washer").unwrap();
        assert_eq!(record.to, dir.0.join("washer/a-3.ply"));
        assert_eq!(fs::read(&record.to).unwrap(), b"bolt/a.ply");
        assert_eq!(
            fs::read(dir.0.join("washer/a.ply")).unwrap(),
            b"washer/a.ply"
        );
        assert!(!scan.exists());
        // The moved-away bolt folder is now empty: no longer a part type.
        assert_eq!(scan_bin(&dir.0).unwrap().part_types, ["washer"]);
        record.undo().unwrap();
        assert_eq!(scan_bin(&dir.0).unwrap(), bin);
    }

    #[test]
    fn move_to_a_new_type_creates_its_folder() {
        let dir = TempDir::new("newtype");
        let scan = touch(&dir.0, "bolt/a.ply");
        touch(&dir.0, "bolt/b.ply");
        let bin = scan_bin(&dir.0).unwrap();
        bin.move_scan(&scan, "stud").unwrap();
        assert_eq!(scan_bin(&dir.0).unwrap().part_types, ["bolt", "stud"]);
    }

    #[test]
    fn undo_refuses_to_overwrite_a_file_that_took_the_old_name() {
        let dir = TempDir::new("undo-clash");
        let scan = touch(&dir.0, "bolt/a.ply");
        touch(&dir.0, "nut/n.ply");
        let bin = scan_bin(&dir.0).unwrap();
        let record = bin.move_scan(&scan, "nut").unwrap();
        fs::write(&scan, b"newcomer").unwrap();
        assert!(matches!(record.undo(), Err(BinError::Move { .. })));
        assert_eq!(fs::read(&scan).unwrap(), b"newcomer");
        assert_eq!(fs::read(&record.to).unwrap(), b"bolt/a.ply");
    }

    #[test]
    fn bad_moves_are_refused() {
        let dir = TempDir::new("badmove");
        let scan = touch(&dir.0, "bolt/a.ply");
        let bin = scan_bin(&dir.0).unwrap();
        for name in ["", ".set-aside", "..", "a/b", "/abs", "bolt/../x"] {
            assert!(
                matches!(
                    bin.move_scan(&scan, name),
                    Err(BinError::BadTypeName { .. })
                ),
                "{name:?}"
            );
        }
        assert!(matches!(
            bin.move_scan(&scan, "bolt"),
            Err(BinError::SameType { .. })
        ));
        assert!(matches!(
            bin.move_scan(&dir.0.join("bolt/other.ply"), "nut"),
            Err(BinError::NotInBin { .. })
        ));
        assert!(scan.exists());
    }

    #[test]
    fn set_aside_hides_the_scan_and_undo_brings_it_back() {
        let dir = TempDir::new("aside");
        let scan = touch(&dir.0, "bolt/a.ply");
        touch(&dir.0, "bolt/b.ply");
        touch(&dir.0, ".set-aside/bolt/a.ply");
        let bin = scan_bin(&dir.0).unwrap();
        let record = bin.set_aside(&scan).unwrap();
        assert_eq!(record.to, dir.0.join(".set-aside/bolt/a-2.ply"));
        assert_eq!(scan_bin(&dir.0).unwrap().scans.len(), 1);
        record.undo().unwrap();
        assert_eq!(scan_bin(&dir.0).unwrap(), bin);
    }
}
