//! The heap freed by a pass's worker threads goes back to the system
//! before the next pass (src/heap.rs). Its own test binary, so no other
//! test allocates in this process while it measures.

#[cfg(all(target_os = "linux", target_env = "gnu"))]
fn anonymous_resident_kb() -> usize {
    std::fs::read_to_string("/proc/self/status")
        .unwrap()
        .lines()
        .find_map(|l| l.strip_prefix("RssAnon:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap()
}

/// A worker thread fills its arena with 40 MB of 16 KiB buffers and frees
/// all but every 64th: the survivors pin the arena, so the allocator keeps
/// the freed pages resident (the pattern of chunk buffers in a pipeline).
/// Handing back must return most of them.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
#[test]
fn freed_worker_arenas_go_back_to_the_system() {
    let survivors = std::thread::spawn(|| {
        let blocks: Vec<Vec<u8>> = (0..2_560)
            .map(|k| vec![(k % 251) as u8 + 1; 16 << 10])
            .collect();
        blocks
            .into_iter()
            .enumerate()
            .filter(|(k, _)| k % 64 == 0)
            .map(|(_, b)| b)
            .collect::<Vec<_>>()
    })
    .join()
    .unwrap();
    let before = anonymous_resident_kb();
    riffle::heap::hand_back_free_heap();
    let after = anonymous_resident_kb();
    assert!(
        before >= after + 20_000,
        "resident anonymous memory {before} kB before handing back, {after} kB after"
    );
    // The survivors are intact (and kept alive until here).
    assert_eq!(survivors.len(), 40);
    assert!(survivors.iter().all(|b| b.len() == 16 << 10 && b[0] != 0));
}
