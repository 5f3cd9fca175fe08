//! The process's memory as Linux reports it in `/proc/self/status`: the peak resident
//! set (`VmHWM`, which counts mapped cache pages too) and the anonymous part (`RssAnon`,
//! the memory that is not page cache), sampled at the end of every pass and kept at its
//! largest. Elsewhere (no `/proc`) every figure is `None`.

use std::sync::atomic::{AtomicU64, Ordering};

static PEAK_ANON: AtomicU64 = AtomicU64::new(0);

/// A field of `/proc/self/status` in bytes (the file gives kB).
fn status_bytes(field: &str) -> Option<u64> {
    let text = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = text.lines().find(|l| l.starts_with(field))?;
    let kb: u64 = line[field.len()..]
        .trim_start_matches(':')
        .split_whitespace()
        .next()?
        .parse()
        .ok()?;
    Some(kb * 1024)
}

/// Takes a sample of the anonymous resident memory (call at the end of a pass, while
/// its scratch buffers are alive).
pub fn sample() {
    if let Some(anon) = status_bytes("RssAnon") {
        PEAK_ANON.fetch_max(anon, Ordering::Relaxed);
    }
}

/// The largest anonymous resident memory sampled so far.
pub fn peak_anon() -> Option<u64> {
    sample();
    match PEAK_ANON.load(Ordering::Relaxed) {
        0 => None,
        v => Some(v),
    }
}

/// The peak resident set of the process (anonymous and file-backed, mapped cache pages
/// included).
pub fn peak_resident() -> Option<u64> {
    status_bytes("VmHWM")
}

#[cfg(test)]
mod tests {
    #[test]
    fn reads_the_figures_on_linux() {
        if std::path::Path::new("/proc/self/status").exists() {
            let v = vec![1u8; 8 << 20];
            assert!(super::peak_resident().unwrap() >= v.len() as u64);
            assert!(super::peak_anon().unwrap() > 0);
        }
    }
}
