//! Allocator settings of the `ratesheet` process (mimalloc, the binary's global allocator).
//!
//! A fit frees and allocates buffers of the same sizes group after group. By default mimalloc
//! hands freed memory back to the operating system after a delay ("purging"), and every page
//! touched again afterwards costs a fault and a zeroing pass in the kernel; on the virtual
//! machines this project is measured on, that cost swings from run to run. A process that runs
//! its statements and exits keeps freed memory for reuse instead (`cargo bench --bench fits`,
//! whole process on L, 8 interleaved runs: median 1.57 s and 0.23 s system CPU kept, against
//! 1.69 s and 0.45 s purged, with outliers up to 2.8 s). Long-lived processes (the shell,
//! cluster servers) keep the default, so memory goes back once a large statement is done.

use libmimalloc_sys::{mi_option_get, mi_option_set, mi_option_t};

/// `mi_option_purge_delay` in the `mi_option_e` enumeration of the mimalloc this crate links
/// (v3, `c_src/mimalloc/v3/include/mimalloc.h` of libmimalloc-sys 0.1.49); the Rust bindings do
/// not name it. The test below checks the position by the option's documented default.
const PURGE_DELAY: mi_option_t = 15;

/// Never purge: freed memory stays with the process until it exits (peak RSS is unchanged).
pub fn keep_freed_memory() {
    // SAFETY: setting an option is a plain store in mimalloc's option table.
    unsafe { mi_option_set(PURGE_DELAY, -1) }
}

/// The purge delay in milliseconds (-1: never).
pub fn purge_delay() -> i64 {
    // SAFETY: reading an option is a plain load (initialised from the environment on first use).
    i64::from(unsafe { mi_option_get(PURGE_DELAY) })
}

#[cfg(test)]
mod tests {
    /// The option at [`super::PURGE_DELAY`] has the purge delay's default, 1000 ms (options.c of
    /// the same mimalloc), which no neighbouring option has; nothing in the library's tests
    /// changes it, and the environment does not set it.
    #[test]
    fn purge_delay_is_the_option_the_constant_names() {
        if std::env::var_os("MIMALLOC_PURGE_DELAY").is_none() {
            assert_eq!(super::purge_delay(), 1000);
        }
    }
}
