//! The parts bin on real folders: the ModelNet10 training split read as a bin (a real,
//! imbalanced, 3,991-file folder tree), and label fixes on a bin of real files in a temp folder.

use std::fs;
use std::path::{Path, PathBuf};

use partsift::learn::{holdout_split, scan_bin, BinWarning};

fn modelnet10_train() -> Option<PathBuf> {
    let dir = Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../shared/data/modelnet10/train"
    ));
    if dir.is_dir() {
        Some(dir.to_path_buf())
    } else {
        println!("skipped: {} is absent", dir.display());
        None
    }
}

#[test]
fn modelnet10_train_reads_as_a_bin_with_its_published_counts() {
    let Some(root) = modelnet10_train() else {
        return;
    };
    let bin = scan_bin(&root).unwrap();
    // The official ModelNet10 training split (Wu et al. 2015): 3,991 files in these 10 classes
    // (total from shared/data/README.md; per-class counts recalled from memory).
    assert_eq!(
        bin.part_types,
        [
            "bathtub",
            "bed",
            "chair",
            "desk",
            "dresser",
            "monitor",
            "night_stand",
            "sofa",
            "table",
            "toilet"
        ]
    );
    assert_eq!(
        bin.counts(),
        [106, 515, 889, 200, 200, 465, 200, 680, 392, 344]
    );
    assert_eq!(bin.scans.len(), 3991);
    assert!(bin
        .scans
        .windows(2)
        .all(|w| (w[0].label, &w[0].path) < (w[1].label, &w[1].path)));
    // chair 889 > 3 x bathtub 106.
    assert_eq!(
        bin.warnings(),
        [BinWarning::Imbalance {
            largest: "chair".into(),
            largest_count: 889,
            smallest: "bathtub".into(),
            smallest_count: 106
        }]
    );
    let labels: Vec<usize> = bin.scans.iter().map(|s| s.label).collect();
    let split = holdout_split(&labels, 0.2, 1).unwrap();
    let mut held = [0usize; 10];
    for &i in &split.holdout {
        held[labels[i]] += 1;
    }
    // round(0.2 x count) per class.
    assert_eq!(held, [21, 103, 178, 40, 40, 93, 40, 136, 78, 69]);
    assert_eq!(split, holdout_split(&labels, 0.2, 1).unwrap());
}

#[test]
fn label_fixes_on_real_scan_files_can_be_undone() {
    let Some(source) = modelnet10_train() else {
        return;
    };
    let root = std::env::temp_dir().join(format!("partsift-learn-bin-{}", std::process::id()));
    let _ = fs::remove_dir_all(&root);
    for (class, n) in [("chair", 6), ("desk", 5)] {
        fs::create_dir_all(root.join(class)).unwrap();
        for i in 1..=n {
            let name = format!("{class}_{i:04}.ply");
            fs::copy(source.join(class).join(&name), root.join(class).join(&name)).unwrap();
        }
    }
    let bin = scan_bin(&root).unwrap();
    assert_eq!(bin.counts(), [6, 5]);
    let chair = bin.scans[0].path.clone();
    let bytes = fs::read(&chair).unwrap();

    let moved = bin.move_scan(&chair, "desk").unwrap();
    assert_eq!(moved.to, root.join("desk/chair_0001.ply"));
    assert_eq!(fs::read(&moved.to).unwrap(), bytes);
    let after = scan_bin(&root).unwrap();
    assert_eq!(after.counts(), [5, 6]);
    assert!(matches!(after.warnings()[..], []));

    let aside = after.set_aside(&moved.to).unwrap();
    let after = scan_bin(&root).unwrap();
    assert_eq!(after.counts(), [5, 5]);
    assert!(aside.to.starts_with(root.join(".set-aside/desk")));

    aside.undo().unwrap();
    moved.undo().unwrap();
    assert_eq!(scan_bin(&root).unwrap(), bin);
    assert_eq!(fs::read(&chair).unwrap(), bytes);
    fs::remove_dir_all(&root).unwrap();
}
