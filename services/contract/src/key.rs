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
        hex::encode(self.0)
    }

    /// Writes the 64 hex digits to `out`.
    pub fn write_hex(&self, out: &mut Vec<u8>) {
        const DIGITS: &[u8; 16] = b"0123456789abcdef";
        for b in self.0 {
            out.push(DIGITS[(b >> 4) as usize]);
            out.push(DIGITS[(b & 15) as usize]);
        }
    }

    /// Parses 64 hex digits (either case).
    pub fn from_hex(s: &str) -> Option<UserKey> {
        let v = hex::decode(s).ok()?;
        Some(UserKey(v.try_into().ok()?))
    }
}

impl fmt::Display for UserKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut buf = Vec::with_capacity(64);
        self.write_hex(&mut buf);
        f.write_str(std::str::from_utf8(&buf).expect("hex is ASCII"))
    }
}

impl serde::Serialize for UserKey {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
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
        assert_eq!(k.to_string(), k.to_hex());
        assert_eq!(UserKey::from_hex(&k.to_hex()), Some(k));
        assert_eq!(UserKey::from_hex(&k.to_hex().to_uppercase()), Some(k));
        assert_eq!(UserKey::from_hex("zz"), None);
        assert_eq!(serde_json::to_string(&k).unwrap(), format!("\"{}\"", k.to_hex()));
    }
}
