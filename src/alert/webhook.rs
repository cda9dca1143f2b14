//! Webhook delivery: the stored JSON payload POSTed as-is, with an HMAC-SHA256 signature
//! over the exact body bytes (`X-Tidemark-Signature: sha256=<hex>`, secret from the
//! environment variable the config names), the event id as the idempotency key
//! (`Idempotency-Key` and `X-Tidemark-Event`), and a timeout. Any answer but 2xx is a
//! failure to retry. Errors name the status or cause, never the URL's path or the secret.

use std::time::Duration;

use hmac::{Hmac, KeyInit, Mac};
use sha2::Sha256;

use super::DeliveryError;
use crate::config::WebhookConfig;

/// Header carrying `sha256=<hex of HMAC-SHA256(secret, body)>`.
pub const SIGNATURE_HEADER: &str = "X-Tidemark-Signature";
/// Headers carrying the alert event id; a receiver drops a second delivery of the same id.
pub const IDEMPOTENCY_HEADER: &str = "Idempotency-Key";
pub const EVENT_HEADER: &str = "X-Tidemark-Event";

/// `sha256=<lower-case hex>` of the HMAC-SHA256 of `body` under `secret`.
pub fn signature(secret: &[u8], body: &[u8]) -> String {
    let mut mac = <Hmac<Sha256> as KeyInit>::new_from_slice(secret).expect("HMAC takes keys of any length");
    mac.update(body);
    let digest = mac.finalize().into_bytes();
    let hex: String = digest.iter().map(|b| format!("{b:02x}")).collect();
    format!("sha256={hex}")
}

/// A client with the channel's timeout (connect and whole request).
pub fn client(config: &WebhookConfig) -> Result<reqwest::Client, DeliveryError> {
    reqwest::Client::builder()
        .timeout(config.timeout)
        .connect_timeout(config.timeout.min(Duration::from_secs(10)))
        .redirect(reqwest::redirect::Policy::none())
        .build()
        .map_err(|err| DeliveryError::Setup(format!("webhook client: {err}")))
}

/// POSTs one payload.
pub async fn send(
    client: &reqwest::Client,
    config: &WebhookConfig,
    event_id: i64,
    payload: &str,
) -> Result<(), DeliveryError> {
    let body = payload.as_bytes().to_vec();
    let mut request = client
        .post(&config.url)
        .header(reqwest::header::CONTENT_TYPE, "application/json")
        .header(IDEMPOTENCY_HEADER, event_id.to_string())
        .header(EVENT_HEADER, event_id.to_string());
    if let Some(name) = &config.secret_env {
        let secret = std::env::var(name).map_err(|_| {
            DeliveryError::Setup(format!("environment variable {name} (webhook secret) is not set"))
        })?;
        request = request.header(SIGNATURE_HEADER, signature(secret.as_bytes(), &body));
    }
    let response = request.body(body).send().await.map_err(|err| {
        let cause = if err.is_timeout() {
            "timed out".to_string()
        } else if err.is_connect() {
            "cannot connect".to_string()
        } else {
            "request failed".to_string()
        };
        DeliveryError::Failed(format!("webhook: {cause}"))
    })?;
    let status = response.status();
    if status.is_success() {
        Ok(())
    } else {
        Err(DeliveryError::Failed(format!("webhook answered {status}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signature_matches_rfc_4231_case_2() {
        // RFC 4231, test case 2: key "Jefe", data "what do ya want for nothing?".
        assert_eq!(
            signature(b"Jefe", b"what do ya want for nothing?"),
            "sha256=5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
        );
    }
}
