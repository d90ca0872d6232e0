//! Tuning of the mimalloc allocator that the `kiln` binary, its benches and examples install.

/// `mi_option_purge_delay` in `mi_option_e` of mimalloc 3 (the version libmimalloc-sys 0.1.49
/// builds by default; same index in mimalloc 2): after `deprecated_eager_commit_delay` = 14.
/// libmimalloc-sys does not name it.
const MI_OPTION_PURGE_DELAY: libmimalloc_sys::mi_option_t = 15;

/// How long freed memory stays mapped for reuse, in milliseconds (`-1`: until the process
/// exits), unless `MIMALLOC_PURGE_DELAY` says otherwise.
pub const PURGE_DELAY_MS: i64 = -1;

/// Keeps freed memory mapped for reuse instead of returning it to the system (mimalloc's default
/// returns it after 10 ms), unless the environment sets `MIMALLOC_PURGE_DELAY` (then that wins).
///
/// Decoding and training allocate and free megabyte buffers every layer: memory returned to the
/// system comes back as fresh pages that the kernel clears on first touch. Measured with
/// `examples/config_speed` (768×512, trained default, runs alternated): 103–115 ms per decode
/// with a 1 s delay, 139–175 ms with the 10 ms default; and even with 1 s, repeated decodes
/// (`cargo bench --bench codec`, 5 s of decoding at quality 50) took 13 933 page faults, with
/// "never" 577 (those of the setup). The cost is that the process keeps its peak working set
/// mapped until it exits — for the `kiln` binary that is one image's or one batch's worth, and
/// freed memory is reused, not piled up. Only has an effect where mimalloc is the global
/// allocator; call it before the work starts.
pub fn keep_freed_memory() {
    if std::env::var_os("MIMALLOC_PURGE_DELAY").is_none() {
        // SAFETY: sets one integer option of the allocator; valid for any value (-1 = never purge).
        unsafe { libmimalloc_sys::mi_option_set(MI_OPTION_PURGE_DELAY, PURGE_DELAY_MS as _) };
    }
}
