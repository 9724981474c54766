//! The pseudonymous user key (docs/contract.md, "Input events").

use std::fmt;

/// A pseudonymous user key: the 32 bytes of `HMAC-SHA256(secret, user_id)`.
/// It stays binary inside the service and is written as 64 lower-case hex
/// digits only at the output edge.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct UserKey(pub [u8; 32]);

impl UserKey {
    /// Lower-case hex, 64 characters (the `user_key` output field).
    pub fn to_hex(&self) -> String {
        self.hex().as_str().to_owned()
    }

    /// The 64 hex digits, without allocating (e.g. a message key per row).
    pub fn hex(&self) -> Hex {
        const DIGITS: &[u8; 16] = b"0123456789abcdef";
        let mut out = [0u8; 64];
        for (i, b) in self.0.iter().enumerate() {
            out[2 * i] = DIGITS[(b >> 4) as usize];
            out[2 * i + 1] = DIGITS[(b & 15) as usize];
        }
        Hex(out)
    }

    /// Parses 64 hex digits (either case).
    pub fn from_hex(s: &str) -> Option<UserKey> {
        let v = hex::decode(s).ok()?;
        Some(UserKey(v.try_into().ok()?))
    }
}

/// A user key's 64 lower-case hex digits, on the stack.
#[derive(Clone, Copy)]
pub struct Hex([u8; 64]);

impl Hex {
    /// The digits as a string.
    pub fn as_str(&self) -> &str {
        std::str::from_utf8(&self.0).expect("hex digits are ASCII")
    }
}

impl fmt::Display for UserKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.hex().as_str())
    }
}

impl serde::Serialize for UserKey {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.hex().as_str())
    }
}

impl<'de> serde::Deserialize<'de> for UserKey {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let s = <std::borrow::Cow<'de, str>>::deserialize(d)?;
        UserKey::from_hex(&s).ok_or_else(|| serde::de::Error::custom("user_key must be 64 hex digits"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_forms_agree() {
        let k = UserKey(std::array::from_fn(|i| (i * 37) as u8));
        // Reference: the `hex` crate's lower-case encoding.
        assert_eq!(k.to_hex(), hex::encode(k.0));
        assert_eq!(k.hex().as_str(), hex::encode(k.0));
        assert_eq!(k.to_string(), k.to_hex());
        assert_eq!(UserKey::from_hex(&k.to_hex()), Some(k));
        assert_eq!(UserKey::from_hex(&k.to_hex().to_uppercase()), Some(k));
        assert_eq!(UserKey::from_hex("zz"), None);
        assert_eq!(serde_json::to_string(&k).unwrap(), format!("\"{}\"", k.to_hex()));
    }
}
