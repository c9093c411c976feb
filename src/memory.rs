//! Large zeroed buffers. On Linux the middle of a large buffer is offered transparent huge
//! pages before it is first written, so that filling the hundreds of megabytes of a large
//! profile's rows takes one page fault per 2 MiB instead of one per 4 KiB (the kernel
//! decides; the advice is ignored where huge pages are off).

/// Below this many bytes a buffer is left to the allocator's usual pages.
const ADVISE_FROM: usize = 4 << 20;

/// The size of an x86-64 or aarch64 Linux huge page.
#[cfg(target_os = "linux")]
const HUGE_PAGE: usize = 2 << 20;

/// `len` zeroed values, with huge pages asked for where the platform has them. The
/// advice goes in before the zeros are written: the allocator's own zeroing (a `memset` for
/// over-aligned types, whatever the size) would fault every small page in first.
pub(crate) fn zeroed_vec<T: bytemuck::Zeroable + Clone>(len: usize) -> Vec<T> {
    let mut values: Vec<T> = Vec::with_capacity(len);
    let bytes = len * std::mem::size_of::<T>();
    if bytes >= ADVISE_FROM {
        advise_huge_pages(values.as_ptr().cast::<u8>(), bytes);
    }
    values.resize(len, T::zeroed());
    values
}

#[cfg(target_os = "linux")]
fn advise_huge_pages(start: *const u8, bytes: usize) {
    let first = (start as usize).next_multiple_of(HUGE_PAGE);
    let end = (start as usize + bytes) / HUGE_PAGE * HUGE_PAGE;
    if end > first {
        // SAFETY: the range lies inside one live allocation of ours; MADV_HUGEPAGE changes
        // how its pages are backed, never their contents. A refusal (huge pages compiled
        // out or switched off) leaves the usual pages, so the result is ignored.
        unsafe {
            libc::madvise(first as *mut libc::c_void, end - first, libc::MADV_HUGEPAGE);
        }
    }
}

#[cfg(not(target_os = "linux"))]
fn advise_huge_pages(_start: *const u8, _bytes: usize) {}

/// Bytes of memory available for new work: `MemAvailable` of `/proc/meminfo` on Linux, and
/// 8 GiB where it cannot be read (a conservative guess for a workstation).
pub(crate) fn available_bytes() -> u64 {
    const FALLBACK: u64 = 8 << 30;
    std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|text| {
            text.lines()
                .find(|l| l.starts_with("MemAvailable:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<u64>().ok())
        })
        .map_or(FALLBACK, |kb| kb.saturating_mul(1024))
}

/// Refuses work that needs more than the available memory: `needed` bytes (saturating
/// arithmetic, so absurd settings are refused rather than overflowing), `detail` naming
/// the settings behind it.
pub(crate) fn check_need(needed: u128, detail: impl FnOnce() -> String) -> crate::Result<()> {
    let available = available_bytes();
    if needed > u128::from(available) {
        return Err(crate::Error::TooMuchMemory {
            needed_gb: needed as f64 / 1e9,
            available_gb: available as f64 / 1e9,
            detail: detail(),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Large and small buffers come back zeroed and of the length asked for.
    #[test]
    fn buffers_are_zeroed() {
        for len in [0, 1, 1000, (ADVISE_FROM / 8) * 3 + 5] {
            let values: Vec<f64> = zeroed_vec(len);
            assert_eq!(values.len(), len);
            assert!(values.iter().all(|&v| v == 0.0));
        }
    }
}
