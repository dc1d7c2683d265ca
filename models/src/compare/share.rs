//! Sticky shares: which model answers a subject when live challengers answer a share of a route's subjects.
//!
//! A subject (a customer, a card) must always meet the same model, across requests, restarts, machines and compiler
//! versions, so the assignment is a pure function of the route name, the subject key and the configured shares.
//! It cannot use `std`'s `RandomState` or `DefaultHasher`: the first is seeded per process and the second's
//! algorithm may change between Rust releases.
//!
//! The hash ([`share_hash`], named [`SHARE_HASH_NAME`]):
//! 1. 64-bit FNV-1a (offset basis `0xcbf29ce484222325`, prime `0x100000001b3`; Fowler, Noll and Vo, described in
//!    the IETF draft "The FNV Non-Cryptographic Hash Algorithm", Eastlake et al.) over the UTF-8 bytes of the route
//!    name, one byte `0xFF` (which never occurs in UTF-8, so route and key cannot run into each other), and the UTF-8
//!    bytes of the subject key;
//! 2. the 64-bit finalizer `fmix64` of MurmurHash3 (Appleby 2011): `k ^= k >> 33; k *= 0xff51afd7ed558ccd;
//!    k ^= k >> 33; k *= 0xc4ceb9fe1a85ec53; k ^= k >> 33`, so that keys differing in their last character (serial
//!    customer numbers) still spread over the whole range, which FNV alone does poorly in its high bits.
//!
//! The top 53 bits give a number `u = (h >> 11) / 2^53` in [0, 1) ([`share_unit`]). With challenger shares
//! `f_1, f_2, ...` (sum at most 1), challenger `k` answers when `u` lies in `[f_1 + ... + f_{k-1}, f_1 + ... + f_k)`
//! and the champion answers otherwise. Raising the first challenger's share only adds subjects to it; subjects
//! already with it stay. The route name is part of the hash so that two routes assign their subjects independently.
//!
//! `tests/fixtures/gen_compare.py` computes the same hashes in Python; the tests pin them.

/// Name of the hash, for logs and reports.
pub const SHARE_HASH_NAME: &str = "fnv1a64+fmix64";

const FNV_OFFSET: u64 = 0xcbf2_9ce4_8422_2325;
const FNV_PRIME: u64 = 0x0000_0100_0000_01b3;

fn fnv1a(mut h: u64, bytes: &[u8]) -> u64 {
    for &b in bytes {
        h ^= u64::from(b);
        h = h.wrapping_mul(FNV_PRIME);
    }
    h
}

fn fmix64(mut k: u64) -> u64 {
    k ^= k >> 33;
    k = k.wrapping_mul(0xff51_afd7_ed55_8ccd);
    k ^= k >> 33;
    k = k.wrapping_mul(0xc4ce_b9fe_1a85_ec53);
    k ^= k >> 33;
    k
}

/// The stable 64-bit hash of a route name and a subject key (see the module overview).
pub fn share_hash(route: &str, subject_key: &str) -> u64 {
    let h = fnv1a(FNV_OFFSET, route.as_bytes());
    let h = fnv1a(h, &[0xFF]);
    fmix64(fnv1a(h, subject_key.as_bytes()))
}

/// The hash as a number in [0, 1): its top 53 bits over `2^53` (exact in `f64`).
pub fn share_unit(route: &str, subject_key: &str) -> f64 {
    (share_hash(route, subject_key) >> 11) as f64 / (1u64 << 53) as f64
}

/// Why a set of shares is not usable.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ShareError {
    /// A share was not in [0, 1].
    #[error("challenger {index} ({name}): share {value} must be in [0, 1]")]
    BadShare {
        /// Position of the challenger.
        index: usize,
        /// Its name.
        name: String,
        /// The share given.
        value: f64,
    },
    /// The shares add up to more than the whole traffic.
    #[error("challenger shares sum to {sum}, more than 1")]
    SumAboveOne {
        /// Their sum.
        sum: f64,
    },
}

/// Which model answers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Assignment {
    /// The champion.
    Champion,
    /// The challenger at this position of the plan.
    Challenger(usize),
}

/// Validated challenger shares of one route.
#[derive(Debug, Clone, PartialEq)]
pub struct SharePlan {
    names: Vec<String>,
    /// Upper ends of the challengers' intervals of `u`.
    cumulative: Vec<f64>,
}

impl Default for SharePlan {
    /// No challenger: the champion answers everyone.
    fn default() -> Self {
        SharePlan {
            names: Vec::new(),
            cumulative: Vec::new(),
        }
    }
}

impl SharePlan {
    /// A plan from `(challenger name, share)` pairs. Errors: a share outside [0, 1] or NaN, a sum above 1.
    pub fn new<S: Into<String>>(
        challengers: impl IntoIterator<Item = (S, f64)>,
    ) -> Result<SharePlan, ShareError> {
        let (mut names, mut cumulative, mut sum) = (Vec::new(), Vec::new(), 0.0f64);
        for (index, (name, value)) in challengers.into_iter().enumerate() {
            let name = name.into();
            if !(0.0..=1.0).contains(&value) {
                return Err(ShareError::BadShare { index, name, value });
            }
            sum += value;
            names.push(name);
            cumulative.push(sum);
        }
        if sum > 1.0 {
            return Err(ShareError::SumAboveOne { sum });
        }
        Ok(SharePlan { names, cumulative })
    }

    /// The challengers' names in plan order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// The model that answers `subject_key` on `route`.
    pub fn assign(&self, route: &str, subject_key: &str) -> Assignment {
        let u = share_unit(route, subject_key);
        self.cumulative
            .iter()
            .position(|&c| u < c)
            .map_or(Assignment::Champion, Assignment::Challenger)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_reference_vectors() {
        // FNV-1a 64 test vectors of the IETF draft "The FNV Non-Cryptographic Hash Algorithm" (from memory):
        // "" -> the offset basis, "a" -> 0xaf63dc4c8601ec8c, "foobar" -> 0x85944171f73967e8.
        assert_eq!(fnv1a(FNV_OFFSET, b""), 0xcbf29ce484222325);
        assert_eq!(fnv1a(FNV_OFFSET, b"a"), 0xaf63dc4c8601ec8c);
        assert_eq!(fnv1a(FNV_OFFSET, b"foobar"), 0x85944171f73967e8);
    }

    #[test]
    fn hashes_pinned_to_an_independent_implementation() {
        // Computed by the Python implementation in tests/fixtures/gen_compare.py (plain integers, written from the
        // FNV and MurmurHash3 descriptions); a change here would move customers between models.
        assert_eq!(share_hash("fraud", "cust-000001"), 0xd49095581f92d5a9);
        assert_eq!(share_hash("fraud", "cust-000002"), 0x4165ab38920732b8);
        assert_eq!(share_hash("fraud", ""), 0x880e641cf3814afc);
        assert_eq!(share_hash("", "cust-000001"), 0x776da1bc24811790);
        assert_eq!(
            share_hash("fraud", "Zo\u{eb}-\u{c5}ngstr\u{f6}m"),
            0x7a80fc7130577347
        );
        assert_eq!(share_unit("fraud", "cust-000002"), 0.2554575932608969);
        let plan = SharePlan::new([("b", 0.1), ("c", 0.25)]).unwrap();
        assert_eq!(
            plan.assign("fraud", "cust-000002"),
            Assignment::Challenger(1)
        );
        assert_eq!(plan.assign("fraud", "cust-000001"), Assignment::Champion);
    }

    #[test]
    fn plan_validation() {
        assert!(matches!(
            SharePlan::new([("b", 0.6), ("c", 0.5)]),
            Err(ShareError::SumAboveOne { .. })
        ));
        assert!(matches!(
            SharePlan::new([("b", f64::NAN)]),
            Err(ShareError::BadShare { index: 0, .. })
        ));
        let none = SharePlan::new(Vec::<(String, f64)>::new()).unwrap();
        assert_eq!(none.assign("fraud", "anyone"), Assignment::Champion);
        let all = SharePlan::new([("b", 1.0)]).unwrap();
        assert_eq!(all.assign("fraud", "anyone"), Assignment::Challenger(0));
    }

    #[test]
    fn raising_a_share_keeps_its_subjects() {
        let small = SharePlan::new([("b", 0.1)]).unwrap();
        let large = SharePlan::new([("b", 0.3)]).unwrap();
        for i in 0..2_000 {
            let key = format!("cust-{i}");
            if small.assign("fraud", &key) == Assignment::Challenger(0) {
                assert_eq!(large.assign("fraud", &key), Assignment::Challenger(0));
            }
        }
    }
}
