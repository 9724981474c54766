//! Pseudonymization of user ids: `user_key = hex(HMAC-SHA256(key, user_id))`.
//!
//! The raw id is turned into a key as soon as an event is validated; only
//! the key is stored, logged or written out. Without the secret key the
//! mapping cannot be recomputed from a guessed id (unlike a plain hash).

use apportion_contract::UserKey;
use hmac::{Hmac, Mac};
use sha2::Sha256;

/// The development key used by `replay` and `demo` when none is configured.
/// Never use it for real data: anyone can recompute keys made with it.
pub const DEVELOPMENT_KEY: &[u8] = b"apportion-development-key-not-secret";

/// Computes user keys with a secret key.
#[derive(Clone)]
pub struct Pseudonymizer {
    mac: Hmac<Sha256>,
}

impl std::fmt::Debug for Pseudonymizer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Pseudonymizer(<secret>)")
    }
}

impl Pseudonymizer {
    /// Builds a pseudonymizer from the secret key bytes (any length).
    pub fn new(key: &[u8]) -> Self {
        Pseudonymizer { mac: Hmac::<Sha256>::new_from_slice(key).expect("HMAC accepts keys of any length") }
    }

    /// The key of one raw user id.
    pub fn key_for(&self, user_id: &str) -> UserKey {
        let mut mac = self.mac.clone();
        mac.update(user_id.as_bytes());
        UserKey(mac.finalize().into_bytes().into())
    }

    /// The key of an event's user: the key it names (an erase by
    /// `user_key`), else the key of its raw id.
    pub fn key_of(&self, ev: &crate::Event) -> UserKey {
        ev.user_key.unwrap_or_else(|| self.key_for(&ev.user_id))
    }

    /// A fingerprint of the secret key: the HMAC of a fixed label that no
    /// user id can equal (it is not valid UTF-8), so it never matches a user
    /// key. The store keeps it to refuse a different key (docs/contract.md,
    /// "Pseudonymization key"); the key cannot be recovered from it.
    pub fn fingerprint(&self) -> [u8; 32] {
        let mut mac = self.mac.clone();
        mac.update(FINGERPRINT_LABEL);
        mac.finalize().into_bytes().into()
    }
}

/// What [`Pseudonymizer::fingerprint`] authenticates: a leading 0xFF byte
/// makes it invalid UTF-8, unlike every user id.
const FINGERPRINT_LABEL: &[u8] = b"\xffapportion key fingerprint v1";

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc4231_test_case_2() {
        // RFC 4231, section 4.3 (test case 2): key "Jefe", data
        // "what do ya want for nothing?", HMAC-SHA-256 below.
        let p = Pseudonymizer::new(b"Jefe");
        assert_eq!(
            p.key_for("what do ya want for nothing?").to_hex(),
            "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
        );
    }

    #[test]
    fn fingerprint_depends_on_the_key_only() {
        // The fingerprint is HMAC-SHA256(key, label) (RFC 2104); the same
        // key gives the same fingerprint, another key another one, and no
        // user id (valid UTF-8) can give it.
        let a = Pseudonymizer::new(b"key-a");
        assert_eq!(a.fingerprint(), Pseudonymizer::new(b"key-a").fingerprint());
        assert_ne!(a.fingerprint(), Pseudonymizer::new(b"key-b").fingerprint());
        // RFC 3629, section 1: the octet 0xFF never appears in UTF-8.
        assert_eq!(FINGERPRINT_LABEL[0], 0xFF);
        assert_ne!(a.fingerprint(), a.key_for("apportion key fingerprint v1").0);
        // Check value from Python 3.11's hmac module:
        // hmac.new(b"key-a", b"\xffapportion key fingerprint v1", hashlib.sha256).hexdigest()
        assert_eq!(hex::encode(a.fingerprint()), "2798eed9994f2155406cd1f875abb820b646089da759fc865172991e35fb89cb");
    }
}
