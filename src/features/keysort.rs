//! Sorting a row's packed keys (`bucket << 1 | sign`), the largest part of
//! finishing a row.
//!
//! A row of short messages has a few dozen keys. Where the processor has
//! AVX-512, rows of up to 64 keys are sorted by a bitonic sorting network
//! (Batcher 1968, "Sorting networks and their applications") held in one, two
//! or four 16-lane registers, padded with `u32::MAX`: a fixed sequence of
//! compare-exchange steps with no branch that depends on the keys. Other rows,
//! and other processors, use a counting sort by the keys' top bits finished by
//! an insertion sort, or the standard sort. Every path gives the same order (the
//! keys are plain integers), which a test checks.

/// Proof that this processor runs the AVX-512 sorting network: only
/// [`WideSort::detect`] makes one.
#[derive(Debug, Clone, Copy)]
pub(super) struct WideSort(());

impl WideSort {
    /// `Some` when the processor has AVX-512F, and `TAMIS_NO_AVX512` is not
    /// set in the environment (a way to run the portable path on any machine).
    pub(super) fn detect() -> Option<WideSort> {
        if std::env::var_os("TAMIS_NO_AVX512").is_some() {
            return None;
        }
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx512f") {
            return Some(WideSort(()));
        }
        None
    }
}

/// Sort a row's keys (each below `2^key_bits`, `key_bits ≤ 32`) in increasing
/// order, with the AVX-512 network when `wide` is given and the row is short
/// enough.
#[inline]
pub(super) fn sort_keys(
    keys: &mut Vec<u32>,
    scratch: &mut Vec<u32>,
    key_bits: u32,
    wide: Option<WideSort>,
) {
    #[cfg(target_arch = "x86_64")]
    if let (Some(_), true) = (wide, keys.len() <= 64) {
        // SAFETY: a `WideSort` exists only when the processor has AVX-512F
        // (`WideSort::detect`), and the row holds at most 64 keys.
        unsafe { avx512::sort_up_to_64(keys) };
        return;
    }
    let _ = wide;
    sort_scalar(keys, scratch, key_bits);
}

/// The sort without AVX-512.
///
/// Rows of typical length are distributed over 64 bins by their top bits (a
/// counting sort: the keys are hashes, so the bins are even) and finished by an
/// insertion sort, which only has to fix the order inside each bin; other
/// lengths use the standard unstable sort.
fn sort_scalar(keys: &mut Vec<u32>, scratch: &mut Vec<u32>, key_bits: u32) {
    const BINS: usize = 64;
    let n = keys.len();
    if !(24..=256).contains(&n) {
        keys.sort_unstable();
        return;
    }
    let shift = key_bits.saturating_sub(BINS.trailing_zeros());
    let bin = |k: u32| (k >> shift) as usize & (BINS - 1);
    let mut start = [0u32; BINS];
    for &k in keys.iter() {
        start[bin(k)] += 1;
    }
    let mut sum = 0;
    for c in start.iter_mut() {
        let here = *c;
        *c = sum;
        sum += here;
    }
    scratch.clear();
    scratch.resize(n, 0);
    for &k in keys.iter() {
        let b = bin(k);
        scratch[start[b] as usize] = k;
        start[b] += 1;
    }
    for i in 1..n {
        let k = scratch[i];
        let mut j = i;
        while j > 0 && scratch[j - 1] > k {
            scratch[j] = scratch[j - 1];
            j -= 1;
        }
        scratch[j] = k;
    }
    std::mem::swap(keys, scratch);
}

#[cfg(target_arch = "x86_64")]
mod avx512 {
    use std::arch::x86_64::*;

    /// Sort `keys` (at most 64) in place. The padding lanes hold `u32::MAX`, so
    /// they sort last; a key equal to it ties with them, which is harmless, as
    /// only the first `keys.len()` lanes are stored back.
    ///
    /// # Safety
    /// The processor must have AVX-512F.
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn sort_up_to_64(keys: &mut [u32]) {
        let n = keys.len();
        assert!(n <= 64, "the network sorts at most 64 keys");
        // Piece `r` of the keys: lanes of register `r` (short or empty at the end).
        let piece = |r: usize| (16 * r).min(n)..(16 * r + 16).min(n);
        if n <= 1 {
        } else if n <= 16 {
            let mut v = [load(keys)];
            network(&mut v);
            store(keys, v[0]);
        } else if n <= 32 {
            let mut v = [load(&keys[piece(0)]), load(&keys[piece(1)])];
            network(&mut v);
            store(&mut keys[piece(0)], v[0]);
            store(&mut keys[piece(1)], v[1]);
        } else {
            let mut v = [
                load(&keys[piece(0)]),
                load(&keys[piece(1)]),
                load(&keys[piece(2)]),
                load(&keys[piece(3)]),
            ];
            network(&mut v);
            for (r, &x) in v.iter().enumerate() {
                store(&mut keys[piece(r)], x);
            }
        }
    }

    /// The keys of `part` (at most 16) in the first lanes, `u32::MAX` in the
    /// others. The load is masked to `part`'s length: nothing past it is read.
    #[inline]
    #[target_feature(enable = "avx512f")]
    fn load(part: &[u32]) -> __m512i {
        debug_assert!(part.len() <= 16);
        let mask = ((1u32 << part.len()) - 1) as u16;
        // SAFETY: the mask selects exactly the `part.len()` elements of `part`,
        // which are valid to read; masked-off lanes are not accessed.
        unsafe { _mm512_mask_loadu_epi32(_mm512_set1_epi32(-1), mask, part.as_ptr() as *const i32) }
    }

    /// Store the first `part.len()` (at most 16) lanes of `v` into `part`; the
    /// store is masked: nothing past it is written.
    #[inline]
    #[target_feature(enable = "avx512f")]
    fn store(part: &mut [u32], v: __m512i) {
        debug_assert!(part.len() <= 16);
        let mask = ((1u32 << part.len()) - 1) as u16;
        // SAFETY: the mask selects exactly the `part.len()` elements of `part`,
        // which are valid to write; masked-off lanes are not accessed.
        unsafe { _mm512_mask_storeu_epi32(part.as_mut_ptr() as *mut i32, mask, v) }
    }

    /// Lanes `i` with `i & j ≠ 0`, for `j` = 1, 2, 4, 8.
    #[inline(always)]
    fn upper(j: usize) -> u16 {
        match j {
            1 => 0xAAAA,
            2 => 0xCCCC,
            4 => 0xF0F0,
            _ => 0xFF00,
        }
    }

    /// The permutation that pairs lane `i` with lane `i ^ j` (`j < 16`).
    #[inline]
    #[target_feature(enable = "avx512f")]
    fn partner(j: usize) -> __m512i {
        let x = j as i32;
        _mm512_set_epi32(
            15 ^ x,
            14 ^ x,
            13 ^ x,
            12 ^ x,
            11 ^ x,
            10 ^ x,
            9 ^ x,
            8 ^ x,
            7 ^ x,
            6 ^ x,
            5 ^ x,
            4 ^ x,
            3 ^ x,
            2 ^ x,
            1 ^ x,
            x,
        )
    }

    /// Bitonic sort of the `16·R` lanes of `v` (lane `16r + i` is lane `i` of
    /// register `r`), ascending.
    ///
    /// Stage `(k, j)` compares lane `l` with lane `l ^ j`; inside a block of `k`
    /// lanes that runs ascending when `l & k = 0`, the lower lane of the pair
    /// takes the smaller key. So lane `l` takes the larger key exactly when
    /// `(l & j ≠ 0) ≠ (l & k ≠ 0)`.
    #[inline]
    #[target_feature(enable = "avx512f")]
    fn network<const R: usize>(v: &mut [__m512i; R]) {
        let lanes = 16 * R;
        let mut k = 2;
        while k <= lanes {
            let mut j = k / 2;
            while j > 0 {
                if j >= 16 {
                    // Partners are in registers `r` and `r | j/16`, same lane.
                    let jr = j / 16;
                    for r in 0..R {
                        if r & jr == 0 {
                            let (a, b) = (v[r], v[r | jr]);
                            let lo = _mm512_min_epu32(a, b);
                            let hi = _mm512_max_epu32(a, b);
                            let ascending = (16 * r) & k == 0;
                            (v[r], v[r | jr]) = if ascending { (lo, hi) } else { (hi, lo) };
                        }
                    }
                } else {
                    let idx = partner(j);
                    for (r, x) in v.iter_mut().enumerate() {
                        // Lanes of this register in a descending block.
                        let descending: u16 = if k < 16 {
                            upper(k)
                        } else if (16 * r) & k != 0 {
                            0xFFFF
                        } else {
                            0
                        };
                        let take_max = upper(j) ^ descending;
                        let p = _mm512_permutexvar_epi32(idx, *x);
                        let lo = _mm512_min_epu32(*x, p);
                        *x = _mm512_mask_max_epu32(lo, take_max, *x, p);
                    }
                }
                j /= 2;
            }
            k *= 2;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The network where the processor has it. With `TAMIS_REQUIRE_AVX512` set
    /// (CI sets it when /proc/cpuinfo lists avx512f), its absence is a failure,
    /// so that a broken detection cannot pass by testing the portable path only.
    fn wide() -> Option<WideSort> {
        let w = WideSort::detect();
        if std::env::var_os("TAMIS_REQUIRE_AVX512").is_some() {
            assert!(
                w.is_some(),
                "TAMIS_REQUIRE_AVX512 is set but AVX-512F was not detected"
            );
        }
        w
    }

    fn check(keys: &[u32], key_bits: u32) {
        let mut want = keys.to_vec();
        want.sort_unstable();
        for wide in [None, wide()] {
            // An exact-size vector: the network must not touch past its end.
            let mut got = keys.to_vec();
            got.shrink_to_fit();
            sort_keys(&mut got, &mut Vec::new(), key_bits, wide);
            assert_eq!(got, want, "wide {}, {} keys", wide.is_some(), keys.len());
        }
    }

    #[test]
    fn every_length_up_to_past_the_network() {
        let mut x = 0x9E37_79B9u32;
        for n in 0..=300 {
            let keys: Vec<u32> = (0..n)
                .map(|_| {
                    x ^= x << 13;
                    x ^= x >> 17;
                    x ^= x << 5;
                    // Few distinct values, so ties are common.
                    if n % 3 == 0 {
                        x % 7
                    } else {
                        x & ((1 << 21) - 1)
                    }
                })
                .collect();
            check(&keys, 21);
        }
    }

    proptest! {
        #[test]
        fn sorts_like_the_standard_sort(keys in proptest::collection::vec(0u32..(1 << 29), 0..80)) {
            check(&keys, 29);
        }

        #[test]
        fn the_largest_key_sorts_with_the_padding(keys in proptest::collection::vec(prop_oneof![Just(u32::MAX), any::<u32>()], 0..70)) {
            check(&keys, 32);
        }
    }
}
