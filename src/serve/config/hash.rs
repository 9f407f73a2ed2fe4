//! The stable hashes of the config layer: the arm assignment of a unit, and the SplitMix64
//! finaliser that the shadow sampling and the demo corpus share.

/// The stable 64-bit hash that assigns units to arms.
///
/// FNV-1a 64 (offset basis 0xcbf29ce484222325, prime 0x100000001b3) over the bytes of the slice
/// name, one 0x00 byte, and the bytes of `unit_id`; then the SplitMix64 finaliser
/// (`z ^= z >> 30; z *= 0xbf58476d1ce4e5b9; z ^= z >> 27; z *= 0x94d049bb133111eb; z ^= z >> 31`)
/// so the high bits are well mixed. The README has a five-line Python version.
#[must_use]
pub fn arm_hash(slice: &str, unit_id: &str) -> u64 {
    mix64(fnv1a64(slice.as_bytes().iter().chain(&[0u8]).chain(unit_id.as_bytes())))
}

/// FNV-1a 64 (Fowler, Noll & Vo): offset basis 0xcbf29ce484222325, prime 0x100000001b3.
#[must_use]
pub fn fnv1a64<'a>(bytes: impl IntoIterator<Item = &'a u8>) -> u64 {
    bytes
        .into_iter()
        .fold(0xcbf2_9ce4_8422_2325, |h: u64, &b| (h ^ u64::from(b)).wrapping_mul(0x0000_0100_0000_01b3))
}

/// The SplitMix64 finaliser (Steele, Lea & Flood, OOPSLA 2014): a bijection of u64 whose output
/// bits each depend on all input bits. Shared by the arm hash, shadow sampling and the corpus
/// generator.
#[must_use]
pub fn mix64(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// The unit's bucket in `0..total_weight`: `(arm_hash · total_weight) >> 64`, which uses the
/// hash's high bits and has no modulo bias beyond 2⁻⁶⁴·total_weight.
#[must_use]
pub fn arm_bucket(slice: &str, unit_id: &str, total_weight: u64) -> u64 {
    ((u128::from(arm_hash(slice, unit_id)) * u128::from(total_weight)) >> 64) as u64
}

#[cfg(test)]
mod tests {
    use super::*;

    /// FNV-1a 64 test vectors: the empty string hashes to the offset basis 0xcbf29ce484222325
    /// and "a" to 0xaf63dc4c8601ec8c (the published FNV test suite; values from memory, and the
    /// first is the algorithm's definition). Checked here through the unfinalised loop.
    #[test]
    fn fnv1a_core_matches_published_vectors() {
        let fnv = |bytes: &[u8]| {
            let mut h: u64 = 0xcbf2_9ce4_8422_2325;
            for &b in bytes {
                h ^= u64::from(b);
                h = h.wrapping_mul(0x0000_0100_0000_01b3);
            }
            h
        };
        assert_eq!(fnv(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv(b"a"), 0xaf63_dc4c_8601_ec8c);
        // arm_hash = splitmix finaliser of fnv("home\0user-1").
        let mut z = fnv(b"home\0user-1");
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        assert_eq!(arm_hash("home", "user-1"), z ^ (z >> 31));
    }
}
