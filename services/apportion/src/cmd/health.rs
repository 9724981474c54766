//! `apportion health --url`: exit 0 when the URL answers 200 (a container
//! healthcheck that needs no curl in the image).

use std::io::{Read, Write};
use std::time::Duration;

use anyhow::{bail, Context, Result};

/// Checks `url` (plain `http://` only).
pub fn run(url: &str) -> Result<()> {
    let rest = url.strip_prefix("http://").context("only http:// URLs are supported")?;
    let (hostport, path) = match rest.find('/') {
        Some(i) => (&rest[..i], &rest[i..]),
        None => (rest, "/"),
    };
    let addr = std::net::ToSocketAddrs::to_socket_addrs(hostport)?.next().context("address did not resolve")?;
    let mut s = std::net::TcpStream::connect_timeout(&addr, Duration::from_secs(3))?;
    s.set_read_timeout(Some(Duration::from_secs(3)))?;
    write!(s, "GET {path} HTTP/1.0\r\nHost: {hostport}\r\n\r\n")?;
    let mut buf = String::new();
    s.read_to_string(&mut buf)?;
    let status = buf.split_whitespace().nth(1).unwrap_or("");
    if status == "200" {
        Ok(())
    } else {
        bail!("{url} answered {status:?}")
    }
}
