//! Undo and redo of region edits.

use super::sidecar::Sidecar;

/// Undo and redo of region edits, as whole-sidecar snapshots (sidecars are small), at most
/// `cap` steps back.
#[derive(Clone, Debug)]
pub struct Edits {
    pub undo: Vec<Sidecar>,
    pub redo: Vec<Sidecar>,
    pub cap: usize,
}

impl Default for Edits {
    fn default() -> Self {
        Edits::new(200)
    }
}

impl Edits {
    /// An empty history keeping at most `cap` undo steps (at least one).
    pub fn new(cap: usize) -> Self {
        Edits {
            undo: Vec::new(),
            redo: Vec::new(),
            cap: cap.max(1),
        }
    }

    /// Remember `before` as the state to return to; call just before changing the sidecar.
    /// A new edit discards the redo steps.
    pub fn record(&mut self, before: &Sidecar) {
        self.undo.push(before.clone());
        if self.undo.len() > self.cap {
            let extra = self.undo.len() - self.cap;
            self.undo.drain(..extra);
        }
        self.redo.clear();
    }

    /// Apply `edit` to `current`, recording the previous state when it changed anything.
    /// Returns whether it did.
    pub fn apply(&mut self, current: &mut Sidecar, edit: impl FnOnce(&mut Sidecar)) -> bool {
        let before = current.clone();
        edit(current);
        if *current == before {
            return false;
        }
        self.record(&before);
        true
    }

    /// Step back one edit; whether there was one.
    pub fn undo(&mut self, current: &mut Sidecar) -> bool {
        match self.undo.pop() {
            Some(prev) => {
                self.redo.push(std::mem::replace(current, prev));
                true
            }
            None => false,
        }
    }

    /// Redo the last undone edit; whether there was one.
    pub fn redo(&mut self, current: &mut Sidecar) -> bool {
        match self.redo.pop() {
            Some(next) => {
                self.undo.push(std::mem::replace(current, next));
                true
            }
            None => false,
        }
    }

    pub fn can_undo(&self) -> bool {
        !self.undo.is_empty()
    }

    pub fn can_redo(&self) -> bool {
        !self.redo.is_empty()
    }

    /// Forget all steps (e.g. when another image is opened).
    pub fn clear(&mut self) {
        self.undo.clear();
        self.redo.clear();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::annotation::{Pin, Shape};

    #[test]
    fn labels_edits_undo_redo_and_cap() {
        let mut sc = Sidecar::new("a.png", 10, 10);
        let mut h = Edits::new(2);
        for i in 0..3 {
            assert!(h.apply(&mut sc, |s| {
                s.add_region(
                    Shape::Box {
                        x0: 0.0,
                        y0: 0.0,
                        x1: 1.0 + i as f64,
                        y1: 1.0,
                    },
                    "x",
                    "",
                );
            }));
        }
        assert!(!h.apply(&mut sc, |_| {}));
        assert_eq!(sc.regions.len(), 3);
        assert!(h.undo(&mut sc));
        assert!(h.undo(&mut sc));
        assert!(!h.undo(&mut sc), "the cap keeps two steps");
        assert_eq!(sc.regions.len(), 1);
        assert!(h.redo(&mut sc));
        assert_eq!(sc.regions.len(), 2);
        h.apply(&mut sc, |s| {
            s.pins.push(Pin {
                id: 99,
                at: [1.0, 1.0],
                text: "n".into(),
            })
        });
        assert!(!h.can_redo(), "a new edit drops the redo steps");
    }
}
