//! The bearer-token check (RFC 6750) of HTTP ingest and of every
//! state-changing endpoint: a request without `Authorization: Bearer
//! <token>`, or with another token, gets `401` with `WWW-Authenticate:
//! Bearer` and never reaches the handler (its body is not read).
//!
//! Use it as `auth::protect(router, token)`, where `token` is what
//! [`ingest_guard`] returns (or a [`BearerToken`] of the endpoint's own).
//!
//! The comparison is in constant time over SHA-256 digests of both tokens:
//! the digests always have 32 bytes, so neither the position of the first
//! differing byte nor the length of the configured token shows in the
//! answer time. The token itself is never logged.

use std::net::SocketAddr;
use std::sync::Arc;

use anyhow::{bail, Result};
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use sha2::{Digest, Sha256};

/// A configured bearer token, kept as its SHA-256 digest.
#[derive(Clone)]
pub struct BearerToken {
    digest: [u8; 32],
}

impl std::fmt::Debug for BearerToken {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("BearerToken(<set>)")
    }
}

/// What a request's `Authorization` header amounts to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verdict {
    /// The configured token.
    Allowed,
    /// No `Authorization: Bearer ...` header (RFC 6750 section 3.1: the
    /// answer carries no error code).
    Missing,
    /// A bearer token, but not the configured one (`invalid_token`).
    Invalid,
}

impl BearerToken {
    /// The token `token` (not empty).
    pub fn new(token: &str) -> BearerToken {
        BearerToken { digest: Sha256::digest(token.as_bytes()).into() }
    }

    /// Checks the value of an `Authorization` header.
    pub fn check(&self, authorization: Option<&HeaderValue>) -> Verdict {
        let Some(given) = authorization.and_then(|v| bearer_credentials(v.as_bytes())) else {
            return Verdict::Missing;
        };
        let d: [u8; 32] = Sha256::digest(given).into();
        if digests_equal(&self.digest, &d) {
            Verdict::Allowed
        } else {
            Verdict::Invalid
        }
    }
}

/// The credentials of `Bearer <token>` (RFC 6750 section 2.1: the scheme,
/// case-insensitive per RFC 9110 section 11.1, one or more spaces, the
/// token); `None` for any other scheme or an empty token.
fn bearer_credentials(value: &[u8]) -> Option<&[u8]> {
    if value.len() < 7 || !value[..6].eq_ignore_ascii_case(b"Bearer") || value[6] != b' ' {
        return None;
    }
    let rest = &value[7..];
    let start = rest.iter().position(|b| *b != b' ')?;
    let token = &rest[start..];
    let end = token.iter().rposition(|b| *b != b' ' && *b != b'\t')? + 1;
    Some(&token[..end])
}

/// Equality of two digests touching every byte whatever they hold.
fn digests_equal(a: &[u8; 32], b: &[u8; 32]) -> bool {
    let diff = a.iter().zip(b.iter()).fold(0u8, |acc, (x, y)| acc | (x ^ y));
    std::hint::black_box(diff) == 0
}

/// The middleware: passes the request on with the right token, else
/// answers 401 (RFC 6750 section 3).
pub async fn require_bearer(State(token): State<Arc<BearerToken>>, req: Request, next: Next) -> Response {
    match token.check(req.headers().get(header::AUTHORIZATION)) {
        Verdict::Allowed => next.run(req).await,
        Verdict::Missing => {
            unauthorized(r#"Bearer realm="apportion""#, "this endpoint needs Authorization: Bearer <token>\n")
        }
        Verdict::Invalid => unauthorized(
            r#"Bearer realm="apportion", error="invalid_token", error_description="the token is not the configured one""#,
            "the bearer token is not the configured one\n",
        ),
    }
}

fn unauthorized(challenge: &'static str, body: &'static str) -> Response {
    (StatusCode::UNAUTHORIZED, [(header::WWW_AUTHENTICATE, challenge)], body).into_response()
}

/// `router` with every route behind [`require_bearer`] with `token`.
pub fn protect<S: Clone + Send + Sync + 'static>(router: axum::Router<S>, token: BearerToken) -> axum::Router<S> {
    router.layer(axum::middleware::from_fn_with_state(Arc::new(token), require_bearer))
}

/// The token ingest listening on `addr` requires: the configured one, or
/// none on a loopback address (with a warning), or an error on any other
/// address, so that an open ingest endpoint is never reachable from the
/// network by accident.
pub fn ingest_guard(token: Option<String>, addr: SocketAddr) -> Result<Option<BearerToken>> {
    match token {
        Some(t) => Ok(Some(BearerToken::new(&t))),
        None if addr.ip().is_loopback() => {
            tracing::warn!(
                %addr,
                "ingest has no token: any local process may POST /v1/events; set APPORTION_EMBEDDED_TOKEN or embedded.token_file"
            );
            Ok(None)
        }
        None => bail!(
            "ingest listens on {addr}, which is not a loopback address, and has no token: set APPORTION_EMBEDDED_TOKEN \
             or embedded.token_file (or listen on 127.0.0.1)"
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_digest_is_sha256() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        let want = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
        let got: String = BearerToken::new("abc").digest.iter().map(|b| format!("{b:02x}")).collect();
        assert_eq!(got, want);
    }

    #[test]
    fn bearer_header_forms() {
        // RFC 6750 section 2.1 example credentials: "Bearer mF_9.B5f-4.1JqM".
        let t = BearerToken::new("mF_9.B5f-4.1JqM");
        let v = |s: &str| HeaderValue::from_str(s).unwrap();
        assert_eq!(t.check(Some(&v("Bearer mF_9.B5f-4.1JqM"))), Verdict::Allowed);
        // The scheme is case-insensitive (RFC 9110 section 11.1).
        assert_eq!(t.check(Some(&v("bearer mF_9.B5f-4.1JqM"))), Verdict::Allowed);
        assert_eq!(t.check(None), Verdict::Missing);
        assert_eq!(t.check(Some(&v("Basic bUZfOS5CNWYtNC4xSnFN"))), Verdict::Missing);
        assert_eq!(t.check(Some(&v("Bearer"))), Verdict::Missing);
        assert_eq!(t.check(Some(&v("Bearer "))), Verdict::Missing);
        assert_eq!(t.check(Some(&v("Bearer mF_9.B5f-4.1Jq"))), Verdict::Invalid);
        assert_eq!(t.check(Some(&v("Bearer mF_9.B5f-4.1JqMx"))), Verdict::Invalid);
        assert_eq!(t.check(Some(&v("Bearer MF_9.B5f-4.1JqM"))), Verdict::Invalid);
    }

    #[test]
    fn digest_comparison_finds_any_differing_byte() {
        let a = [7u8; 32];
        assert!(digests_equal(&a, &a));
        for i in 0..32 {
            let mut b = a;
            b[i] ^= 0x80;
            assert!(!digests_equal(&a, &b), "byte {i}");
        }
    }

    #[test]
    fn no_token_is_allowed_on_loopback_only() {
        for ok in ["127.0.0.1:9465", "127.8.9.10:1", "[::1]:9465"] {
            assert!(ingest_guard(None, ok.parse().unwrap()).unwrap().is_none(), "{ok}");
        }
        for bad in ["0.0.0.0:9465", "192.0.2.10:9465", "[::]:9465"] {
            let e = ingest_guard(None, bad.parse().unwrap()).unwrap_err().to_string();
            assert!(e.contains("not a loopback address") && e.contains("APPORTION_EMBEDDED_TOKEN"), "{e}");
        }
        assert!(ingest_guard(Some("t0k".into()), "0.0.0.0:1".parse().unwrap()).unwrap().is_some());
        // The token never shows in a debug print.
        assert!(!format!("{:?}", BearerToken::new("t0k")).contains("t0k"));
    }
}
