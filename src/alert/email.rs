//! Email delivery over SMTP with lettre: plain (a local relay), STARTTLS or implicit TLS;
//! credentials from the environment variables the config names; a plain-text and an HTML
//! part rendered from the stored payload; the Message-ID names the event, so a second
//! delivery of the same event can be recognised. Errors never carry credentials.

use lettre::message::{Mailbox, MultiPart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::{AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};

use super::DeliveryError;
use super::message::email_text;
use crate::config::{EmailConfig, Tls};

/// The Message-ID of an event's email.
pub fn message_id(event_id: i64) -> String {
    format!("<tidemark-event-{event_id}@tidemark.invalid>")
}

/// Sends one payload to every recipient.
pub async fn send(config: &EmailConfig, event_id: i64, payload: &str) -> Result<(), DeliveryError> {
    let message = build_message(config, event_id, payload)?;
    let transport = transport(config)?;
    transport.send(message).await.map_err(|err| {
        let kind = if err.is_permanent() { "refused" } else { "failed" };
        DeliveryError::Failed(format!(
            "smtp {}:{}: {kind}: {}",
            config.smtp_host,
            config.smtp_port,
            short(&err)
        ))
    })?;
    Ok(())
}

fn short(err: &lettre::transport::smtp::Error) -> String {
    let text = err.to_string();
    text.chars().take(200).collect()
}

fn build_message(config: &EmailConfig, event_id: i64, payload: &str) -> Result<Message, DeliveryError> {
    let text = email_text(payload);
    let address = |a: &str| {
        a.parse::<Mailbox>()
            .map_err(|_| DeliveryError::Setup(format!("alert.email: {a:?} is not an email address")))
    };
    let mut builder = Message::builder()
        .from(address(&config.from)?)
        .subject(text.subject)
        .message_id(Some(message_id(event_id)));
    for to in &config.to {
        builder = builder.to(address(to)?);
    }
    builder
        .multipart(MultiPart::alternative_plain_html(text.plain, text.html))
        .map_err(|err| DeliveryError::Setup(format!("building the email: {err}")))
}

fn transport(config: &EmailConfig) -> Result<AsyncSmtpTransport<Tokio1Executor>, DeliveryError> {
    let host = config.smtp_host.as_str();
    let setup = |err: lettre::transport::smtp::Error| DeliveryError::Setup(format!("smtp {host}: {err}"));
    let builder = match config.tls {
        Tls::None => AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(host),
        Tls::StartTls => AsyncSmtpTransport::<Tokio1Executor>::starttls_relay(host).map_err(setup)?,
        Tls::Implicit => AsyncSmtpTransport::<Tokio1Executor>::relay(host).map_err(setup)?,
    };
    let mut builder = builder.port(config.smtp_port).timeout(Some(config.timeout));
    if let (Some(user_env), Some(password_env)) = (&config.username_env, &config.password_env) {
        let var = |name: &str| {
            std::env::var(name)
                .map_err(|_| DeliveryError::Setup(format!("environment variable {name} is not set")))
        };
        builder = builder.credentials(Credentials::new(var(user_env)?, var(password_env)?));
    }
    Ok(builder.build())
}
