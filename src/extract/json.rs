//! JSON extracts: newline-delimited objects (one record a line; a bad line is rejected and the
//! rest carries on) and a top-level array of objects, read element by element so memory is
//! bounded by the largest record (and the source's limits on record bytes and nesting). A
//! syntax error in an array stops the file: there is no safe place to resume; an array cut
//! short is truncated. A key that appears twice in one record is a problem, never silently
//! the last value.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::fmt;
use std::io::{BufRead, BufReader};

use chrono::NaiveDate;
use serde::de::{self, Deserialize, DeserializeSeed, Deserializer, MapAccess, SeqAccess, Visitor};
use serde_json::{Map, Value};

use super::encoding::decode_legacy;
use super::limits::JsonGuard;
use super::mapping::{Mapped, Mapping, RawValue, map_row};
use super::pipeline;
use super::{ExtractError, MAX_FIELD_BYTES, ParseError, Problem, ProblemKind, Row, raw_text};
use crate::model::Field;

pub(super) fn parse_lines<E>(
    input: Box<dyn BufRead + '_>,
    mapping: &Mapping,
    latest: NaiveDate,
    sink: &mut impl FnMut(Row) -> Result<(), E>,
) -> Result<(), ParseError<E>> {
    let mut input = BufReader::with_capacity(64 * 1024, JsonGuard::new(input, 0, &mapping.limits));
    let mut line = 0u64;
    let mut saw_any = false;
    // Lines are read here and parsed on a second thread (see `pipeline`); blank lines are
    // skipped but counted. The item holds exactly the bytes to parse.
    let read = |(buffer, number): &mut (Vec<u8>, u64)| -> Result<bool, ExtractError> {
        loop {
            buffer.clear();
            if input.read_until(b'\n', buffer).map_err(ExtractError::from)? == 0 {
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
        (Ok(text), _) => serde_json::from_str::<Parsed>(text),
        (Err(_), Some(encoding)) => serde_json::from_str::<Parsed>(&decode_legacy(bytes, encoding)),
        (Err(_), None) => {
            return reject(line, ProblemKind::InvalidEncoding, "line is not valid UTF-8".into(), raw);
        }
    };
    match parsed {
        Ok(Parsed::Object(object, repeated)) => object_row(&object, &repeated, line, mapping, latest, raw),
        Ok(Parsed::Other(_)) => reject(line, ProblemKind::WrongType, "expected a JSON object".into(), raw),
        Err(err) => {
            reject(line, ProblemKind::InvalidJson, format!("not valid JSON ({})", describe(&err)), raw)
        }
    }
}

/// What a serde_json error says, without any value it quotes: syntax and end-of-input
/// messages name only the position; type errors can quote the value, so they are replaced.
fn describe(err: &serde_json::Error) -> String {
    match err.classify() {
        serde_json::error::Category::Data => {
            format!("a value of the wrong type at line {} column {}", err.line(), err.column())
        }
        _ => err.to_string(),
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
    let guarded = BufReader::with_capacity(64 * 1024, JsonGuard::new(input, 1, &mapping.limits));
    let mut deserializer = serde_json::Deserializer::from_reader(guarded);
    // The guard's depth limit (default 64) acts before serde_json's own (128).
    let mut records = Records { mapping, latest, sink, sink_error: None, count: 0 };
    let result = (&mut records).deserialize(&mut deserializer).and_then(|()| deserializer.end());
    if let Some(err) = records.sink_error {
        return Err(ParseError::Sink(err));
    }
    match result {
        Err(err) if err.is_eof() && records.count == 0 && err.line() <= 1 && err.column() == 0 => {
            Err(ExtractError::Empty.into())
        }
        Err(err) if err.is_io() => Err(ExtractError::from(std::io::Error::from(err)).into()),
        Err(err) if err.is_eof() => Err(ExtractError::Truncated(format!(
            "the JSON document ends at line {} before its records are closed",
            err.line()
        ))
        .into()),
        Err(err) if err.classify() == serde_json::error::Category::Data => {
            Err(ExtractError::Json(format!("expected a JSON array of records ({})", describe(&err))).into())
        }
        Err(err) => Err(ExtractError::Json(describe(&err)).into()),
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
        while let Some(parsed) = seq.next_element::<Parsed>()? {
            self.count += 1;
            let row = match parsed {
                Parsed::Object(object, repeated) => {
                    let raw = raw_text(serde_json::to_string(&object).unwrap_or_default().as_bytes());
                    object_row(&object, &repeated, self.count, self.mapping, self.latest, raw)
                }
                Parsed::Other(value) => {
                    let raw = raw_text(value.to_string().as_bytes());
                    reject(self.count, ProblemKind::WrongType, "expected a JSON object".into(), raw)
                }
            };
            if let Err(err) = (self.sink)(row) {
                self.sink_error = Some(err);
                return Err(de::Error::custom("stopped: storing a row failed"));
            }
        }
        Ok(())
    }
}

/// One record as parsed: an object with the keys that appeared in it more than once (the
/// map keeps the last value of each), or some other JSON value where a record belongs.
enum Parsed {
    Object(Map<String, Value>, Vec<String>),
    Other(Value),
}

impl<'de> Deserialize<'de> for Parsed {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Parsed, D::Error> {
        deserializer.deserialize_any(ParsedVisitor)
    }
}

struct ParsedVisitor;

impl<'de> Visitor<'de> for ParsedVisitor {
    type Value = Parsed;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a JSON record")
    }

    fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> Result<Parsed, A::Error> {
        let mut object = Map::new();
        let mut repeated = Vec::new();
        while let Some(key) = access.next_key::<String>()? {
            let value: Value = access.next_value()?;
            if object.insert(key.clone(), value).is_some() && !repeated.contains(&key) {
                repeated.push(key);
            }
        }
        Ok(Parsed::Object(object, repeated))
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Parsed, A::Error> {
        let mut items = Vec::new();
        while let Some(item) = seq.next_element::<Value>()? {
            items.push(item);
        }
        Ok(Parsed::Other(Value::Array(items)))
    }

    fn visit_bool<E: de::Error>(self, v: bool) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::Bool(v)))
    }

    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::from(v)))
    }

    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::from(v)))
    }

    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::from(v)))
    }

    fn visit_str<E: de::Error>(self, v: &str) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::String(v.to_string())))
    }

    fn visit_unit<E: de::Error>(self) -> Result<Parsed, E> {
        Ok(Parsed::Other(Value::Null))
    }
}

/// The problem of a key that appeared more than once in one record.
const REPEATED: RawValue<'static> =
    RawValue::Unreadable(ProblemKind::RepeatedField, "the key appears more than once in the record");

fn object_row(
    object: &Map<String, Value>,
    repeated: &[String],
    line: u64,
    mapping: &Mapping,
    latest: NaiveDate,
    raw: String,
) -> Row {
    let is_repeated = |key: &str| repeated.iter().any(|r| r == key);
    let extra: BTreeMap<String, String> = object
        .iter()
        .filter(|(key, value)| mapping.is_extra(key) && !value.is_null() && !is_repeated(key))
        .map(|(key, value)| match value {
            Value::String(text) => (key.clone(), text.clone()),
            other => (key.clone(), other.to_string()),
        })
        .collect();
    let get = |field: Field| {
        let column = mapping.column(field)?;
        if is_repeated(column) {
            return Some(REPEATED);
        }
        object.get(column).map(raw_value)
    };
    let mut extra_problems: Vec<Problem> = repeated
        .iter()
        .filter(|key| mapping.is_extra(key))
        .map(|key| Problem {
            line,
            field: Some(key.clone()),
            kind: ProblemKind::RepeatedField,
            message: format!(
                "column \"{key}\": the key appears more than once in the record; the value was dropped"
            ),
            raw: None,
        })
        .collect();
    match map_row(mapping, line, latest, get, extra) {
        Mapped::Accepted { record, mut problems } => {
            problems.append(&mut extra_problems);
            Row::Accepted { line, record, raw, problems }
        }
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
