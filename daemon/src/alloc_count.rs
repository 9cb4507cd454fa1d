//! Counting heap allocations on the decode path, so "no allocation per bin
//! after warm-up" is a number a user can read in `ctl status` rather than a
//! promise. The `decoderd` binary installs [`CountingAllocator`]; the
//! real-time loop marks the stretches that are the decode path (waiting,
//! reading, decoding, sending, recording) and leaves out control requests,
//! which allocate by design. Counting costs one thread-local read per
//! allocation, plus an atomic increment on the decode path, where there
//! should be none.

use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};

thread_local! {
    static ON_DECODE_PATH: Cell<bool> = const { Cell::new(false) };
}

static DECODE_PATH_ALLOCATIONS: AtomicU64 = AtomicU64::new(0);
static INSTALLED: AtomicBool = AtomicBool::new(false);

/// The system allocator, counting allocations made on the decode path.
pub struct CountingAllocator;

// SAFETY: every call is forwarded unchanged to the system allocator; the
// counting touches only a const-initialised thread-local Cell (no lazy
// initialisation, no allocation, no destructor) and an atomic.
unsafe impl GlobalAlloc for CountingAllocator {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        note();
        // SAFETY: forwarded with the caller's layout.
        unsafe { System.alloc(layout) }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: forwarded with the caller's pointer and layout.
        unsafe { System.dealloc(ptr, layout) }
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        note();
        // SAFETY: forwarded with the caller's layout.
        unsafe { System.alloc_zeroed(layout) }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        note();
        // SAFETY: forwarded with the caller's arguments.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

fn note() {
    if ON_DECODE_PATH.try_with(Cell::get).unwrap_or(false) {
        DECODE_PATH_ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
    }
}

/// Called by a binary that installed [`CountingAllocator`].
pub fn mark_installed() {
    INSTALLED.store(true, Ordering::Relaxed);
}

/// Marks whether the calling thread is on the decode path now.
pub fn set_on_decode_path(on: bool) {
    let _ = ON_DECODE_PATH.try_with(|f| f.set(on));
}

/// Allocations on the decode path since start; `None` when the counting
/// allocator is not installed (the library used in another binary).
pub fn decode_path_allocations() -> Option<u64> {
    INSTALLED
        .load(Ordering::Relaxed)
        .then(|| DECODE_PATH_ALLOCATIONS.load(Ordering::Relaxed))
}
