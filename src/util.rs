//! Small helpers shared by the stages: number formatting, memory readings, locks.

use std::fs::OpenOptions;
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::{Error, IoContext, Result};

/// Format an integer with thousands separators (`1234567` → `1,234,567`).
pub fn thousands(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// Format a byte count with a binary unit (`1536` → `1.5 KiB`).
pub fn bytes(n: u64) -> String {
    const UNITS: [&str; 5] = ["B", "KiB", "MiB", "GiB", "TiB"];
    let mut v = n as f64;
    let mut u = 0;
    while v >= 1024.0 && u + 1 < UNITS.len() {
        v /= 1024.0;
        u += 1;
    }
    if u == 0 {
        format!("{n} B")
    } else {
        format!("{v:.1} {}", UNITS[u])
    }
}

/// Format a rate with an SI suffix (`1234567.0` → `1.23 M`).
pub fn si(x: f64) -> String {
    let (v, u) = if x >= 1e9 {
        (x / 1e9, " G")
    } else if x >= 1e6 {
        (x / 1e6, " M")
    } else if x >= 1e3 {
        (x / 1e3, " k")
    } else {
        (x, "")
    };
    format!("{v:.2}{u}")
}

/// Peak and current anonymous resident memory of this process in bytes, read
/// from `/proc/self/status` (`VmHWM` is for all resident pages; `RssAnon` counts
/// only memory that is not file-backed, so mapped shards do not count).
/// Returns `None` where `/proc` is not available.
pub fn rss_anon() -> Option<u64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    s.lines()
        .find_map(|l| l.strip_prefix("RssAnon:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
        .map(|kb| kb * 1024)
}

/// A lock file held for the life of the value: `DIR/.lock` or `FILE.lock`.
///
/// Created with `O_EXCL`; a lock whose owning process no longer runs (checked
/// through `/proc/PID`) is stale and taken over.
#[derive(Debug)]
pub struct Lock {
    path: PathBuf,
}

impl Lock {
    /// Take the lock at `path`, or explain who holds it.
    pub fn acquire(path: &Path) -> Result<Lock> {
        for _ in 0..2 {
            match OpenOptions::new().write(true).create_new(true).open(path) {
                Ok(mut f) => {
                    writeln!(f, "{}", std::process::id()).at(path)?;
                    return Ok(Lock {
                        path: path.to_path_buf(),
                    });
                }
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {
                    let owner = std::fs::read_to_string(path)
                        .ok()
                        .and_then(|s| s.trim().parse::<u32>().ok());
                    let alive =
                        owner.is_some_and(|pid| Path::new(&format!("/proc/{pid}")).exists());
                    if alive {
                        return Err(Error::Invalid(format!(
                            "{} is locked by running process {}: another tamis command is writing here",
                            path.display(),
                            owner.unwrap_or(0)
                        )));
                    }
                    // Stale: its owner died. Remove and retry once.
                    let _ = std::fs::remove_file(path);
                }
                Err(e) => return Err(e).at(path),
            }
        }
        Err(Error::Invalid(format!(
            "{}: could not take the lock",
            path.display()
        )))
    }
}

impl Drop for Lock {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Ask for the cache line holding `x` ahead of its use (a hint: it never
/// faults, writes nothing and changes nothing but timing; it does nothing where
/// unsupported). Weights and rows are read at random places, so the loads of a
/// whole block are started before the first is needed.
#[inline(always)]
pub fn prefetch<T>(x: &T) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: a prefetch never faults, and this one is of a valid reference;
    // SSE is part of every x86_64 target.
    unsafe {
        use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
        _mm_prefetch::<_MM_HINT_T0>(x as *const T as *const i8);
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = x;
}

/// Bytes of a huge page on x86_64 and arm64 Linux (the transparent kind).
const HUGE_PAGE: usize = 2 << 20;

/// A fixed-length array of numbers (`f64` unless said otherwise), zeroed at
/// creation, for weight tables that are read at random places: it lives in an
/// anonymous memory map advised to use transparent huge pages (`madvise`, on
/// Linux), starting on a huge-page boundary, so that a table of several MiB
/// needs a few entries of the processor's address translation cache instead of
/// one per 4 KiB. Where the system gives no huge pages the advice is ignored
/// and the pages are ordinary. Arrays under 2 MiB live on the heap.
pub struct HugeVec<T: bytemuck::Pod = f64> {
    store: HugeStore<T>,
    len: usize,
}

enum HugeStore<T> {
    Heap(Vec<T>),
    /// The map and the byte offset of the array's start inside it.
    Map(memmap2::MmapMut, usize),
}

impl<T: bytemuck::Pod> HugeVec<T> {
    /// `len` zeros.
    pub fn zeroed(len: usize) -> HugeVec<T> {
        let bytes = len * std::mem::size_of::<T>();
        let heap = || HugeVec {
            store: HugeStore::Heap(vec![T::zeroed(); len]),
            len,
        };
        if bytes < HUGE_PAGE {
            return heap();
        }
        // One huge page more than needed, so the array can start on a
        // boundary; pages never touched take no memory.
        let Ok(map) = memmap2::MmapMut::map_anon(bytes + HUGE_PAGE) else {
            // No map (an exotic system): the heap still works.
            return heap();
        };
        #[cfg(target_os = "linux")]
        let _ = map.advise(memmap2::Advice::HugePage);
        let at = map.as_ptr() as usize;
        let start = at.next_multiple_of(HUGE_PAGE) - at;
        HugeVec {
            store: HugeStore::Map(map, start),
            len,
        }
    }
}

impl<T: bytemuck::Pod> std::ops::Deref for HugeVec<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        match &self.store {
            HugeStore::Heap(v) => v,
            // The map is page-aligned and `start` a multiple of a huge page,
            // so the cast is aligned; the length was mapped.
            HugeStore::Map(m, start) => {
                bytemuck::cast_slice(&m[*start..*start + self.len * std::mem::size_of::<T>()])
            }
        }
    }
}

impl<T: bytemuck::Pod> std::ops::DerefMut for HugeVec<T> {
    fn deref_mut(&mut self) -> &mut [T] {
        match &mut self.store {
            HugeStore::Heap(v) => v,
            HugeStore::Map(m, start) => bytemuck::cast_slice_mut(
                &mut m[*start..*start + self.len * std::mem::size_of::<T>()],
            ),
        }
    }
}

impl<T: bytemuck::Pod> From<&[T]> for HugeVec<T> {
    fn from(x: &[T]) -> HugeVec<T> {
        let mut h = HugeVec::zeroed(x.len());
        h.copy_from_slice(x);
        h
    }
}

impl<T: bytemuck::Pod> Clone for HugeVec<T> {
    fn clone(&self) -> HugeVec<T> {
        HugeVec::from(&self[..])
    }
}

impl<T: bytemuck::Pod + PartialEq> PartialEq for HugeVec<T> {
    fn eq(&self, other: &HugeVec<T>) -> bool {
        self[..] == other[..]
    }
}

impl<T: bytemuck::Pod> std::fmt::Debug for HugeVec<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("HugeVec").field("len", &self.len).finish()
    }
}

/// Append `x` with six decimals, exactly as `format!("{x:.6}")` writes it (the
/// exact binary value rounded half to even, the sign kept for negative values
/// that round to zero), without the formatting machinery: for scoring's output,
/// where it took a tenth of the time. Values it has no fast path for (not
/// finite, or 2^53 and beyond) go through `format!`.
pub fn push_fixed6(out: &mut Vec<u8>, x: f64) {
    let Some(units) = fixed6_units(x) else {
        use std::io::Write as _;
        let _ = write!(out, "{x:.6}");
        return;
    };
    if x.is_sign_negative() {
        out.push(b'-');
    }
    let (int, frac) = (units / 1_000_000, (units % 1_000_000) as u32);
    let mut digits = [0u8; 40];
    let mut n = digits.len();
    let mut v = int;
    loop {
        n -= 1;
        digits[n] = b'0' + (v % 10) as u8;
        v /= 10;
        if v == 0 {
            break;
        }
    }
    out.extend_from_slice(&digits[n..]);
    out.push(b'.');
    let mut f = [b'0'; 6];
    let mut v = frac;
    for d in f.iter_mut().rev() {
        *d = b'0' + (v % 10) as u8;
        v /= 10;
    }
    out.extend_from_slice(&f);
}

/// `|x|·10⁶` rounded half to even, for finite `|x| < 2^53`.
fn fixed6_units(x: f64) -> Option<u128> {
    if !x.is_finite() || x.abs() >= 9_007_199_254_740_992.0 {
        return None;
    }
    let bits = x.to_bits();
    let exp = ((bits >> 52) & 0x7ff) as i32;
    let frac = bits & ((1u64 << 52) - 1);
    // |x| = m·2^e exactly.
    let (m, e) = if exp == 0 {
        (frac, -1074)
    } else {
        (frac | (1u64 << 52), exp - 1075)
    };
    let n = u128::from(m) * 1_000_000;
    if e >= 0 {
        // |x| < 2^53 with e ≥ 0 means m·2^e < 2^53: no overflow.
        return Some(n << e);
    }
    let k = (-e) as u32;
    if k >= 80 {
        // n < 2^73, so n/2^k < 1/2^7: rounds to zero.
        return Some(0);
    }
    let q = n >> k;
    let rem = n & ((1u128 << k) - 1);
    let half = 1u128 << (k - 1);
    Some(if rem > half || (rem == half && q & 1 == 1) {
        q + 1
    } else {
        q
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Small and large arrays start as zeros, keep what is written, clone and
    /// compare by content; a large one starts on a huge-page boundary.
    #[test]
    fn huge_vecs_hold_their_numbers() {
        for len in [0usize, 3, 1 << 10, (3 << 20) / 8 + 5] {
            let mut h: HugeVec = HugeVec::zeroed(len);
            assert_eq!(h.len(), len);
            assert!(h.iter().all(|&x| x == 0.0));
            for (i, x) in h.iter_mut().enumerate() {
                *x = i as f64 * 0.5;
            }
            let c = h.clone();
            assert!(c == h);
            assert_eq!(
                c.last().copied(),
                len.checked_sub(1).map(|i| i as f64 * 0.5)
            );
            let from = HugeVec::from(&c[..]);
            assert!(from == h);
            if len * 8 >= HUGE_PAGE {
                assert_eq!(h.as_ptr() as usize % HUGE_PAGE, 0);
            }
        }
        let mut f: HugeVec<f32> = HugeVec::zeroed(HUGE_PAGE);
        f[HUGE_PAGE - 1] = 2.5;
        assert_eq!(f.iter().sum::<f32>(), 2.5);
        assert_eq!(format!("{f:?}"), format!("HugeVec {{ len: {HUGE_PAGE} }}"));
    }

    #[test]
    fn formats() {
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1000), "1,000");
        assert_eq!(thousands(1234567), "1,234,567");
        assert_eq!(bytes(512), "512 B");
        assert_eq!(bytes(1536), "1.5 KiB");
        assert_eq!(bytes(3 << 30), "3.0 GiB");
    }

    #[test]
    fn lock_is_exclusive_and_stale_locks_are_taken() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join(".lock");
        let l = Lock::acquire(&p).unwrap();
        let e = Lock::acquire(&p).unwrap_err();
        assert!(e.to_string().contains("locked by running process"), "{e}");
        drop(l);
        assert!(!p.exists());
        // A lock left by a process that no longer exists (pid beyond pid_max).
        std::fs::write(&p, "4294967290\n").unwrap();
        let _l = Lock::acquire(&p).unwrap();
    }

    #[test]
    fn rss_anon_reads() {
        assert!(rss_anon().unwrap() > 0);
    }

    /// The fast six-decimal formatting writes what the standard library's
    /// `{:.6}` writes (the reference), on ties, signs, tiny and large values,
    /// and random bit patterns.
    #[test]
    fn fixed6_matches_the_standard_formatting() {
        use rand::{Rng, SeedableRng};
        let check = |x: f64| {
            let mut got = Vec::new();
            super::push_fixed6(&mut got, x);
            assert_eq!(String::from_utf8(got).unwrap(), format!("{x:.6}"), "{x:e}");
        };
        // Exact ties at the sixth decimal: k/2^7 ·10⁶ ends in .5.
        for k in 0..512 {
            check(k as f64 / 128.0);
            check(-(k as f64) / 128.0);
        }
        for x in [
            0.0,
            -0.0,
            1e-9,
            -1e-9,
            5e-7,
            -5e-7,
            4.9999999e-7,
            0.1,
            0.5,
            1.0,
            2.5,
            -2.5,
            123.456789,
            999999.9999995,
            1e15,
            -1e15,
            9.007199254740991e15,
            9.1e15,
            1e300,
            f64::MIN_POSITIVE,
            5e-324,
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
        ] {
            check(x);
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(6);
        for _ in 0..30_000 {
            check(rng.random_range(-50.0..50.0));
            check(f64::from_bits(rng.random::<u64>()));
            // Values close to a tie.
            let q: i64 = rng.random_range(-10_000_000..10_000_000);
            check((q as f64 + 0.5) / 1e6);
        }
    }
}
