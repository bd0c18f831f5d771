//! A memory of facts read from files, bounded by cycle.
//!
//! The service reads facts from published files again and again (each new
//! step looks up the earlier steps of its cycle), and keeps what it read so
//! as not to open the same file twice: each open costs memory the NetCDF and
//! HDF5 libraries keep. A service that runs for months must not keep the
//! facts of every file it ever read, though: this memory keeps the files of
//! the `cycles` cycles used last and forgets a cycle's files, all at once,
//! when more recent cycles push it out.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Facts `V` of files, each file filed under its cycle `G`.
#[derive(Debug)]
pub struct ByCycle<G, V> {
    cycles: usize,
    entries: HashMap<PathBuf, (G, V)>,
    /// The cycles held, the one used last at the end.
    order: Vec<G>,
}

impl<G: Clone + PartialEq, V> ByCycle<G, V> {
    /// An empty memory of at most `cycles` cycles (at least one).
    pub fn new(cycles: usize) -> ByCycle<G, V> {
        ByCycle {
            cycles: cycles.max(1),
            entries: HashMap::new(),
            order: Vec::new(),
        }
    }

    /// What is known of `path`, its cycle now counting as used last.
    pub fn get(&mut self, path: &Path) -> Option<&V> {
        let g = self.entries.get(path)?.0.clone();
        self.touch(&g);
        self.entries.get(path).map(|(_, v)| v)
    }

    /// Remember `v` of `path`, a file of cycle `g` (in place of what was
    /// known of it). The least recently used cycles beyond the bound are
    /// forgotten, with all their files.
    pub fn insert(&mut self, path: &Path, g: G, v: V) {
        self.touch(&g);
        self.entries.insert(path.to_path_buf(), (g, v));
        if self.order.len() > self.cycles {
            let gone: Vec<G> = self.order.drain(..self.order.len() - self.cycles).collect();
            self.entries.retain(|_, (g, _)| !gone.contains(g));
        }
    }

    /// Files remembered.
    pub fn len(&self) -> usize {
        self.entries.len()
    }

    /// True when nothing is remembered.
    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    fn touch(&mut self, g: &G) {
        if let Some(k) = self.order.iter().position(|x| x == g) {
            let g = self.order.remove(k);
            self.order.push(g);
        } else {
            self.order.push(g.clone());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(cycle: u32, step: u32) -> PathBuf {
        PathBuf::from(format!("/out/{cycle:04}/step_{step:03}.nc"))
    }

    #[test]
    fn the_memory_holds_the_last_cycles_only() {
        // A month of 6-hourly cycles of 81 steps each, every step looking up
        // the earlier steps of its cycle, as the service does.
        let mut m: ByCycle<u32, u64> = ByCycle::new(4);
        for cycle in 0..120 {
            for step in 0..81 {
                for earlier in 0..step {
                    assert_eq!(m.get(&file(cycle, earlier)), Some(&u64::from(earlier)));
                }
                m.insert(&file(cycle, step), cycle, u64::from(step));
            }
            // Bounded: at most the 4 cycles used last, whatever has gone before.
            assert!(
                m.len() <= 4 * 81,
                "cycle {cycle}: {} files remembered",
                m.len()
            );
        }
        assert_eq!(m.len(), 4 * 81);
        assert!(m.get(&file(116, 0)).is_some());
        assert!(m.get(&file(115, 80)).is_none());
    }

    #[test]
    fn a_cycle_used_again_is_kept_before_one_that_is_not() {
        let mut m: ByCycle<u32, &str> = ByCycle::new(2);
        m.insert(&file(1, 0), 1, "a");
        m.insert(&file(2, 0), 2, "b");
        // Cycle 1 read again (a late step of it): cycle 2 is now the older.
        assert_eq!(m.get(&file(1, 0)), Some(&"a"));
        m.insert(&file(3, 0), 3, "c");
        assert_eq!(m.get(&file(1, 0)), Some(&"a"));
        assert_eq!(m.get(&file(2, 0)), None);
        assert_eq!(m.get(&file(3, 0)), Some(&"c"));
        // A file read again replaces what was known of it.
        m.insert(&file(3, 0), 3, "d");
        assert_eq!(m.get(&file(3, 0)), Some(&"d"));
        assert_eq!(m.len(), 2);
    }
}
