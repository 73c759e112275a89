//! An HTTP link: one GET of a JSON document per tick serves every tag on the link; tags
//! are RFC 6901 JSON Pointers into it.

use std::path::Path;
use std::time::Duration;

use super::error::LinkError;
use crate::report::Reporting;

/// Largest document accepted; a reading endpoint that sends more is misbehaving.
const MAX_BODY_BYTES: usize = 1 << 20;

#[derive(Debug, Clone)]
pub struct HttpLink {
    name: String,
    url: String,
    client: reqwest::Client,
    reporting: Reporting,
}

impl HttpLink {
    /// A link to `url`; an https:// server's certificate must chain to the system's roots
    /// or to one of the PEM certificates in `ca_file`.
    pub fn new(
        name: &str,
        url: &str,
        ca_file: Option<&Path>,
        timeout: Duration,
        reporting: Reporting,
    ) -> Result<Self, LinkError> {
        let error = |reason: String| LinkError::Http { link: name.to_owned(), url: url.to_owned(), reason };
        // Straight to the device on the control network: no proxy from the environment.
        let mut builder = reqwest::Client::builder().timeout(timeout).no_proxy();
        if let Some(file) = ca_file {
            let pem = std::fs::read(file)
                .map_err(|e| error(format!("cannot read ca_file {}: {e}", file.display())))?;
            let certificates = reqwest::Certificate::from_pem_bundle(&pem)
                .map_err(|e| error(format!("ca_file {} is not PEM certificates: {e}", file.display())))?;
            if certificates.is_empty() {
                return Err(error(format!("ca_file {} holds no PEM certificate", file.display())));
            }
            builder = builder.tls_certs_merge(certificates);
        }
        let client = builder.build().map_err(|e| error(describe(&e)))?;
        Ok(HttpLink { name: name.to_owned(), url: url.to_owned(), client, reporting })
    }

    pub fn name(&self) -> &str {
        &self.name
    }

    /// Fetches the document once, counting the request in the metrics.
    pub async fn fetch(&self) -> Result<serde_json::Value, LinkError> {
        let started = std::time::Instant::now();
        let result = self.get().await;
        self.reporting.link_request(&self.name, started.elapsed().as_secs_f64(), result.as_ref().err());
        result
    }

    #[tracing::instrument(level = "trace", skip_all, fields(link = %self.name))]
    async fn get(&self) -> Result<serde_json::Value, LinkError> {
        let http =
            |reason: String| LinkError::Http { link: self.name.clone(), url: self.url.clone(), reason };
        let response = self.client.get(&self.url).send().await.map_err(|e| http(describe(&e)))?;
        let status = response.status();
        if !status.is_success() {
            return Err(LinkError::HttpStatus {
                link: self.name.clone(),
                url: self.url.clone(),
                status: status.as_u16(),
            });
        }
        if response.content_length().is_some_and(|n| n > MAX_BODY_BYTES as u64) {
            return Err(http(format!("the document is larger than {MAX_BODY_BYTES} bytes")));
        }
        // Read chunk by chunk, so a chunked answer without a length is cut off at the
        // limit rather than held in memory whole.
        let mut response = response;
        let mut body = Vec::new();
        while let Some(chunk) = response.chunk().await.map_err(|e| http(describe(&e)))? {
            if body.len() + chunk.len() > MAX_BODY_BYTES {
                return Err(http(format!("the document is larger than {MAX_BODY_BYTES} bytes")));
            }
            body.extend_from_slice(&chunk);
        }
        serde_json::from_slice(&body).map_err(|e| http(format!("the answer is not JSON: {e}")))
    }

    /// The number at `pointer` in a fetched document.
    pub fn number(&self, document: &serde_json::Value, tag: &str, pointer: &str) -> Result<f64, LinkError> {
        let not = |found: String| LinkError::NotNumeric {
            link: self.name.clone(),
            tag: tag.to_owned(),
            pointer: pointer.to_owned(),
            found,
        };
        match document.pointer(pointer) {
            Some(serde_json::Value::Number(n)) => {
                n.as_f64().ok_or_else(|| not(format!("{n} is not a finite number")))
            }
            Some(other) => Err(not(format!("{other} is not a number"))),
            None => Err(not("nothing is there".into())),
        }
    }
}

fn describe(e: &reqwest::Error) -> String {
    if e.is_timeout() {
        "no answer within the timeout".into()
    } else if e.is_connect() {
        format!("cannot connect ({})", with_causes(e))
    } else {
        with_causes(e)
    }
}

/// The error and what caused it, down the chain: a refused certificate says why only
/// in its causes.
fn with_causes(e: &dyn std::error::Error) -> String {
    let mut text = e.to_string();
    let mut cause = e.source();
    while let Some(c) = cause {
        let c_text = c.to_string();
        if !text.contains(&c_text) {
            text.push_str(": ");
            text.push_str(&c_text);
        }
        cause = c.source();
    }
    text
}
