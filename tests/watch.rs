//! The watcher on a real directory with real inotify: a file written in chunks
//! counts only once closed; a file renamed into place counts at once; hidden
//! and temporary names never; files already there when watching starts are
//! caught up; nothing counts twice. Bounded in time.

use std::io::Write;
use std::time::{Duration, Instant};

use leeward::service::watch::watch;

#[test]
fn finished_files_only_once_each() {
    let d = std::env::temp_dir().join(format!("leeward-watch-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    std::fs::write(d.join("before.grib2"), b"arrived while down").unwrap();
    // A file there before watching starts gets no event: the first scan finds it and it
    // counts once unchanged for the settle time (2 s). Files that get close or rename
    // events count at once, well before that.
    let w = watch(&d, Duration::from_secs(2), Duration::from_millis(200)).unwrap();
    let first = w.next(Duration::from_secs(6));
    assert_eq!(
        first.as_deref(),
        Some(d.join("before.grib2").as_path()),
        "catch-up at start"
    );

    // Written in chunks, open all the while: nothing until it is closed.
    let growing = d.join("growing.grib2");
    let mut f = std::fs::File::create(&growing).unwrap();
    let t0 = Instant::now();
    for _ in 0..8 {
        f.write_all(&[7u8; 4096]).unwrap();
        f.flush().unwrap();
        assert!(
            w.next(Duration::from_millis(100)).is_none(),
            "reported while still growing"
        );
    }
    drop(f);
    let got = w.next(Duration::from_secs(5));
    assert_eq!(got.as_deref(), Some(growing.as_path()));
    assert!(t0.elapsed() < Duration::from_secs(5));

    // Renamed into place from a hidden temporary: counts; the temporary never does.
    let tmp = d.join(".incoming.grib2.tmp");
    std::fs::write(&tmp, b"complete").unwrap();
    std::fs::rename(&tmp, d.join("renamed.grib2")).unwrap();
    assert_eq!(
        w.next(Duration::from_secs(5)).as_deref(),
        Some(d.join("renamed.grib2").as_path())
    );
    std::fs::write(d.join("scratch.part"), b"never").unwrap();
    assert!(
        w.next(Duration::from_millis(1200)).is_none(),
        "temporary names and repeats never count"
    );
    let _ = std::fs::remove_dir_all(&d);
}
