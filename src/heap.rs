//! Handing freed heap memory back to the system between the passes of a
//! scan.
//!
//! The C allocator keeps what worker threads freed in their own arenas for
//! reuse; after a pass whose threads churned through chunk buffers, those
//! arenas hold tens of MB that nothing live uses, and resident memory would
//! carry them into the next pass (on 10,000,000 features ~30 MB, which made
//! the peak grow with the number of features). glibc's `malloc_trim`
//! returns the free pages of every arena, not only the top of the main heap.

/// Returns free heap pages to the system; a no-op where the allocator has
/// no such call. Cheap (a walk over the free lists), so it is called once
/// per pass.
pub fn hand_back_free_heap() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim only releases memory the allocator owns and has
    // marked free; it does not touch live allocations.
    unsafe {
        libc::malloc_trim(0);
    }
}
