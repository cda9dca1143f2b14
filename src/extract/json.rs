//! JSON extracts: newline-delimited objects (one record a line; a bad line is rejected and the
//! rest carries on) and a top-level array of objects, read element by element so memory is
//! bounded by the largest record. A syntax error in an array stops the file: there is no safe
//! place to resume.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::fmt;
use std::io::BufRead;

use chrono::NaiveDate;
use serde::de::{self, DeserializeSeed, Deserializer, SeqAccess, Visitor};
use serde_json::{Map, Value};

use super::encoding::decode_legacy;
use super::mapping::{Mapped, Mapping, RawValue, map_row};
use super::pipeline;
use super::{ExtractError, MAX_FIELD_BYTES, ParseError, Problem, ProblemKind, Row, raw_text};
use crate::model::Field;

pub(super) fn parse_lines<E>(
    mut input: Box<dyn BufRead + '_>,
    mapping: &Mapping,
    latest: NaiveDate,
    sink: &mut impl FnMut(Row) -> Result<(), E>,
) -> Result<(), ParseError<E>> {
    let mut line = 0u64;
    let mut saw_any = false;
    // Lines are read here and parsed on a second thread (see `pipeline`); blank lines are
    // skipped but counted. The item holds exactly the bytes to parse.
    let read = |(buffer, number): &mut (Vec<u8>, u64)| -> Result<bool, ExtractError> {
        loop {
            buffer.clear();
            if input.read_until(b'\n', buffer).map_err(ExtractError::Read)? == 0 {
                return Ok(false);
            }
            line += 1;
            let mut start = buffer.len() - buffer.trim_ascii_start().len();
            let end = start + trim_ascii(&buffer[start..]).len();
            if line == 1 && buffer[start..end].starts_with(&UTF8_BOM) {
                start += UTF8_BOM.len();
            }
            if start == end {
                continue;
            }
            buffer.truncate(end);
            buffer.drain(..start);
            saw_any = true;
            *number = line;
            return Ok(true);
        }
    };
    let map = |batch: &[(Vec<u8>, u64)]| {
        batch.iter().map(|(bytes, number)| line_row(bytes, *number, mapping, latest)).collect()
    };
    pipeline::run(read, || (Vec::new(), 0), map, sink)?;
    if !saw_any {
        return Err(ExtractError::Empty.into());
    }
    Ok(())
}

fn line_row(bytes: &[u8], line: u64, mapping: &Mapping, latest: NaiveDate) -> Row {
    let raw = raw_text(bytes);
    let parsed = match (std::str::from_utf8(bytes), mapping.fallback_encoding) {
        (Ok(text), _) => serde_json::from_str::<Value>(text),
        (Err(_), Some(encoding)) => serde_json::from_str::<Value>(&decode_legacy(bytes, encoding)),
        (Err(_), None) => {
            return reject(line, ProblemKind::InvalidEncoding, "line is not valid UTF-8".into(), raw);
        }
    };
    match parsed {
        Ok(Value::Object(object)) => object_row(&object, line, mapping, latest, raw),
        Ok(_) => reject(line, ProblemKind::WrongType, "expected a JSON object".into(), raw),
        Err(err) => reject(line, ProblemKind::InvalidJson, format!("not valid JSON ({err})"), raw),
    }
}

pub(super) fn parse_array<E>(
    input: Box<dyn BufRead + '_>,
    mapping: &Mapping,
    latest: NaiveDate,
    sink: &mut impl FnMut(Row) -> Result<(), E>,
) -> Result<(), ParseError<E>> {
    let mut input = input;
    skip_bom_and_blank(&mut input)?;
    let mut deserializer = serde_json::Deserializer::from_reader(input);
    let mut records = Records { mapping, latest, sink, sink_error: None, count: 0 };
    let result = (&mut records).deserialize(&mut deserializer).and_then(|()| deserializer.end());
    if let Some(err) = records.sink_error {
        return Err(ParseError::Sink(err));
    }
    match result {
        Err(err) if err.is_eof() && records.count == 0 && err.line() <= 1 && err.column() == 0 => {
            Err(ExtractError::Empty.into())
        }
        Err(err) if err.is_io() => Err(ExtractError::Read(err.into()).into()),
        Err(err) => Err(ExtractError::Json(err.to_string()).into()),
        Ok(()) => Ok(()),
    }
}

/// Feeds each element of a top-level array to the sink as soon as it is parsed.
struct Records<'a, S, E> {
    mapping: &'a Mapping,
    latest: NaiveDate,
    sink: &'a mut S,
    sink_error: Option<E>,
    count: u64,
}

impl<'de, S, E> DeserializeSeed<'de> for &mut Records<'_, S, E>
where
    S: FnMut(Row) -> Result<(), E>,
{
    type Value = ();

    fn deserialize<D: Deserializer<'de>>(self, deserializer: D) -> Result<(), D::Error> {
        deserializer.deserialize_seq(self)
    }
}

impl<'de, S, E> Visitor<'de> for &mut Records<'_, S, E>
where
    S: FnMut(Row) -> Result<(), E>,
{
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a JSON array of records")
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        while let Some(value) = seq.next_element::<Value>()? {
            self.count += 1;
            let raw = raw_text(value.to_string().as_bytes());
            let row = match &value {
                Value::Object(object) => object_row(object, self.count, self.mapping, self.latest, raw),
                _ => reject(self.count, ProblemKind::WrongType, "expected a JSON object".into(), raw),
            };
            if let Err(err) = (self.sink)(row) {
                self.sink_error = Some(err);
                return Err(de::Error::custom("stopped: storing a row failed"));
            }
        }
        Ok(())
    }
}

fn object_row(
    object: &Map<String, Value>,
    line: u64,
    mapping: &Mapping,
    latest: NaiveDate,
    raw: String,
) -> Row {
    let extra: BTreeMap<String, String> = object
        .iter()
        .filter(|(key, value)| mapping.is_extra(key) && !value.is_null())
        .map(|(key, value)| match value {
            Value::String(text) => (key.clone(), text.clone()),
            other => (key.clone(), other.to_string()),
        })
        .collect();
    let get = |field: Field| object.get(mapping.column(field)?).map(raw_value);
    match map_row(mapping, line, latest, get, extra) {
        Mapped::Accepted { record, problems } => Row::Accepted { line, record, raw, problems },
        Mapped::Rejected(problem) => Row::Rejected(Problem { raw: Some(raw), ..problem }),
    }
}

fn raw_value(value: &Value) -> RawValue<'_> {
    match value {
        Value::Null => RawValue::Null,
        Value::String(text) => text_value(text),
        Value::Number(number) => RawValue::Text(Cow::Owned(number.to_string())),
        Value::Bool(flag) => RawValue::Text(Cow::Owned(flag.to_string())),
        Value::Array(items) => {
            let texts: Option<Vec<String>> = items
                .iter()
                .map(|item| match item {
                    Value::String(text) => Some(text.clone()),
                    Value::Number(number) => Some(number.to_string()),
                    _ => None,
                })
                .collect();
            match texts {
                Some(texts) => RawValue::List(texts),
                None => RawValue::Unreadable(ProblemKind::WrongType, "list items must be text or numbers"),
            }
        }
        Value::Object(_) => RawValue::Unreadable(ProblemKind::WrongType, "expected a value, found an object"),
    }
}

fn text_value(text: &str) -> RawValue<'_> {
    if text.len() > MAX_FIELD_BYTES {
        RawValue::Unreadable(ProblemKind::FieldTooLong, "value longer than 64 KiB")
    } else if text.contains('\0') {
        RawValue::Unreadable(ProblemKind::NulByte, "value contains a NUL character")
    } else {
        RawValue::Text(Cow::Borrowed(text))
    }
}

fn reject(line: u64, kind: ProblemKind, message: String, raw: String) -> Row {
    Row::Rejected(Problem { line, field: None, kind, message, raw: Some(raw) })
}

const UTF8_BOM: [u8; 3] = [0xEF, 0xBB, 0xBF];

/// Skips a UTF-8 BOM and leading whitespace; a file with nothing else is empty.
fn skip_bom_and_blank(input: &mut Box<dyn BufRead + '_>) -> Result<(), ExtractError> {
    if input.fill_buf()?.starts_with(&UTF8_BOM) {
        input.consume(UTF8_BOM.len());
    }
    loop {
        let buffer = input.fill_buf()?;
        if buffer.is_empty() {
            return Err(ExtractError::Empty);
        }
        let blank = buffer.iter().take_while(|b| b.is_ascii_whitespace()).count();
        let done = blank < buffer.len();
        input.consume(blank);
        if done {
            return Ok(());
        }
    }
}

fn trim_ascii(bytes: &[u8]) -> &[u8] {
    bytes.trim_ascii()
}
