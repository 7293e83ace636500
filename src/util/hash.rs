//! FNV-1a, the 64-bit Fowler–Noll–Vo hash (Fowler, Noll & Vo; IETF draft
//! draft-eastlake-fnv): checksums of tables and settings, to tell inputs apart (not a
//! cryptographic hash).

/// A running FNV-1a hash.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Fnv1a(u64);

impl Fnv1a {
    pub(crate) fn new() -> Self {
        Self(0xcbf2_9ce4_8422_2325)
    }

    /// Adds `bytes`.
    pub(crate) fn eat(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0 ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3);
        }
    }

    pub(crate) fn finish(self) -> u64 {
        self.0
    }
}
