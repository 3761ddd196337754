//! A count of heavy work (forward passes, map preparation, PCA, panel pictures, region
//! statistics, figures) per thread. The window promises that its GUI thread does none of it;
//! the tests read this count on the thread that draws the frames to show that it stays zero.
//! Counting is one thread-local increment, cheap enough to leave in release builds.

use std::cell::Cell;

thread_local! {
    static HEAVY: Cell<u64> = const { Cell::new(0) };
}

/// Mark the start of one piece of heavy work on the current thread.
pub fn heavy_work() {
    HEAVY.with(|c| c.set(c.get() + 1));
}

/// How many pieces of heavy work the current thread has started.
pub fn heavy_work_on_this_thread() -> u64 {
    HEAVY.with(Cell::get)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_per_thread() {
        let before = heavy_work_on_this_thread();
        heavy_work();
        assert_eq!(heavy_work_on_this_thread(), before + 1);
        let other = std::thread::spawn(|| {
            heavy_work();
            heavy_work_on_this_thread()
        })
        .join()
        .unwrap();
        assert_eq!(other, 1, "another thread has its own count");
        assert_eq!(heavy_work_on_this_thread(), before + 1);
    }
}
