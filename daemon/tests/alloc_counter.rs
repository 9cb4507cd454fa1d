//! The decode-path allocation counter counts what it should: allocations
//! on a thread marked as on the decode path, and nothing else.

use daemon::alloc_count::{
    CountingAllocator, decode_path_allocations, mark_installed, set_on_decode_path,
};

#[global_allocator]
static ALLOCATOR: CountingAllocator = CountingAllocator;

#[test]
fn counts_only_marked_stretches() {
    assert_eq!(
        decode_path_allocations(),
        None,
        "not reported before install"
    );
    mark_installed();
    let before = decode_path_allocations().unwrap();
    let unmarked: Vec<u64> = (0..100).collect();
    assert_eq!(decode_path_allocations().unwrap(), before);
    set_on_decode_path(true);
    let marked: Vec<u8> = vec![1; 4096];
    let grown = std::hint::black_box(marked.repeat(2));
    set_on_decode_path(false);
    assert_eq!(decode_path_allocations().unwrap(), before + 2);
    // Other threads are not on the decode path.
    std::thread::spawn(|| std::hint::black_box(vec![0u8; 10]))
        .join()
        .unwrap();
    assert_eq!(decode_path_allocations().unwrap(), before + 2);
    drop((unmarked, grown));
}
