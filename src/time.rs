//! Timestamps: milliseconds since the Unix epoch (UTC) inside the service, RFC 3339 at the edges.

use time::format_description::well_known::Rfc3339;
use time::OffsetDateTime;

/// Milliseconds since the Unix epoch, UTC.
pub type Millis = i64;

/// The current wall-clock time in milliseconds.
pub fn now_ms() -> Millis {
    (OffsetDateTime::now_utc().unix_timestamp_nanos() / 1_000_000) as Millis
}

/// Formats milliseconds as an RFC 3339 timestamp (UTC, millisecond precision).
pub fn to_rfc3339(ms: Millis) -> String {
    let nanos = i128::from(ms) * 1_000_000;
    match OffsetDateTime::from_unix_timestamp_nanos(nanos) {
        Ok(t) => {
            let t = t
                .replace_nanosecond((ms.rem_euclid(1000) as u32) * 1_000_000)
                .unwrap_or(t);
            t.format(&Rfc3339).unwrap_or_else(|_| ms.to_string())
        }
        Err(_) => ms.to_string(),
    }
}

/// Parses an RFC 3339 timestamp into milliseconds; `None` when it is not one.
pub fn parse_rfc3339(text: &str) -> Option<Millis> {
    OffsetDateTime::parse(text, &Rfc3339)
        .ok()
        .map(|t| (t.unix_timestamp_nanos() / 1_000_000) as Millis)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc3339_round_trips_at_millisecond_precision() {
        let ms = 1_764_633_600_123; // 2025-12-02T00:00:00.123Z
        let text = to_rfc3339(ms);
        assert_eq!(text, "2025-12-02T00:00:00.123Z");
        assert_eq!(parse_rfc3339(&text), Some(ms));
    }

    #[test]
    fn offsets_are_normalised_to_utc() {
        assert_eq!(
            parse_rfc3339("2025-12-02T01:00:00+01:00"),
            parse_rfc3339("2025-12-02T00:00:00Z")
        );
        assert_eq!(parse_rfc3339("yesterday"), None);
    }
}

/// Serde helpers that keep timestamps as RFC 3339 strings in stored and served records.
pub mod rfc3339 {
    use super::{parse_rfc3339, to_rfc3339, Millis};
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(ms: &Millis, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&to_rfc3339(*ms))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Millis, D::Error> {
        let text = String::deserialize(d)?;
        parse_rfc3339(&text).ok_or_else(|| {
            serde::de::Error::custom(format!("`{text}` is not an RFC 3339 timestamp"))
        })
    }

    /// The same for `Option<Millis>` (`null` when absent).
    pub mod option {
        use super::*;

        pub fn serialize<S: Serializer>(ms: &Option<Millis>, s: S) -> Result<S::Ok, S::Error> {
            match ms {
                Some(ms) => s.serialize_some(&to_rfc3339(*ms)),
                None => s.serialize_none(),
            }
        }

        pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Millis>, D::Error> {
            Option::<String>::deserialize(d)?
                .map(|text| {
                    parse_rfc3339(&text).ok_or_else(|| {
                        serde::de::Error::custom(format!("`{text}` is not an RFC 3339 timestamp"))
                    })
                })
                .transpose()
        }
    }
}
