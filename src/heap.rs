//! Handing memory the allocator holds free back to the system.
//!
//! Reading a map builds a JSON tree many times the size of the parameters it yields, and frees it
//! again. glibc's allocator gives freed memory back only from the top of each arena, and the
//! long-lived pieces of every map loaded (its parameters, names, cache entry) land above the
//! freed tree of the next, so those pages stay resident though nothing uses them. The sidecar
//! comparison's memory step (`benches/sidecar_compare`) measured this: a store of 100 matrix
//! maps of K = 1000 left about 100 MiB of such pages; `malloc_trim(0)` after loading returned
//! them. Other allocators (musl, macOS, Windows) have no such call; there this does nothing.

/// Asks the allocator to return the free pages of every arena to the system. Returns whether it
/// gave anything back. It walks and locks each arena in turn, so call it after a burst of
/// allocation (a store rescan that read files), never on the request path.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
#[allow(unsafe_code)]
pub fn release_freed() -> bool {
    // SAFETY: malloc_trim takes no pointers and touches only glibc's own free lists, under the
    // locks glibc takes for every other allocator call.
    unsafe { libc::malloc_trim(0) == 1 }
}

/// Asks the allocator to return free pages to the system: nothing to ask off glibc.
#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
pub fn release_freed() -> bool {
    false
}
