//! Tuning of the mimalloc allocator that the `kiln` binary, its benches and examples install.

/// `mi_option_purge_delay` in mimalloc 2's `mi_option_e` (after `eager_commit_delay` = 14, which
/// libmimalloc-sys names; it does not name this one).
const MI_OPTION_PURGE_DELAY: libmimalloc_sys::mi_option_t = 15;

/// How long freed memory stays mapped for reuse, unless `MIMALLOC_PURGE_DELAY` says otherwise.
pub const PURGE_DELAY_MS: i64 = 1000;

/// Keeps freed memory mapped for [`PURGE_DELAY_MS`] before mimalloc returns it to the system
/// (its default is 10 ms), unless the environment sets `MIMALLOC_PURGE_DELAY` (then that wins).
///
/// Decoding and training allocate and free megabyte buffers every layer, and most layers take
/// longer than 10 ms: with the default each buffer came back as fresh pages that the kernel
/// cleared on first touch. Measured with `examples/config_speed` (768×512, trained default,
/// runs alternated): 103–115 ms per decode with 1 s, 139–175 ms with the 10 ms default. Only
/// has an effect where mimalloc is the global allocator; call it before the work starts.
pub fn keep_freed_memory() {
    if std::env::var_os("MIMALLOC_PURGE_DELAY").is_none() {
        // SAFETY: sets one integer option of the allocator; valid for any value (-1 = never purge).
        unsafe { libmimalloc_sys::mi_option_set(MI_OPTION_PURGE_DELAY, PURGE_DELAY_MS as _) };
    }
}
