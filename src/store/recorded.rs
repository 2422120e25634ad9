//! A score record's features, as the record keeps them.
//!
//! A record used to keep the features object's JSON text as sent. With 30 numeric features
//! that text is about 560 of a record's 900 bytes, mostly the names again and again, and sled's
//! cost per record follows its bytes: the log write, the leaf rewrites, and how many records a
//! page holds (see `score_pages`). So when the caller sent every feature with a value (nothing
//! absent, nothing `null`), the record keeps the validated values in schema order instead, one
//! 8-byte word each, and the names once per page ([`FeatureLayout`]). Rendered back, such a
//! record is the JSON object the caller sent, up to key order, whitespace and how a number was
//! spelled (`1e2` reads back as `100.0`: the same number). A request with an absent or `null`
//! feature keeps its text as sent, since the validated row holds the imputed default, not what
//! was sent.

use std::sync::{Arc, Mutex};

use serde::{Deserialize, Deserializer, Serialize, Serializer};
use serde_json::value::RawValue;

use crate::schema::{Row, Schema, Value};

/// The names a page's value records are rendered with: each feature's name and, for a
/// category feature, its categories in declared order (a value holds the category's index).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureLayout {
    names: Vec<String>,
    categories: Vec<Vec<String>>,
}

impl FeatureLayout {
    /// The layout of rows the schema validates.
    pub fn of(schema: &Schema) -> FeatureLayout {
        FeatureLayout {
            names: schema.features().iter().map(|f| f.name.clone()).collect(),
            categories: schema
                .features()
                .iter()
                .map(|f| f.categories.clone())
                .collect(),
        }
    }

    /// The number of features (values per record).
    pub fn len(&self) -> usize {
        self.names.len()
    }

    pub fn is_empty(&self) -> bool {
        self.names.is_empty()
    }

    /// The layout as stored in a page.
    pub fn to_bytes(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a layout serializes")
    }

    /// A stored layout; `None` if the bytes are not one.
    pub fn from_bytes(bytes: &[u8]) -> Option<FeatureLayout> {
        let layout: FeatureLayout = serde_json::from_slice(bytes).ok()?;
        (layout.names.len() == layout.categories.len()).then_some(layout)
    }
}

/// The layout of the pages written or read last, with its bytes: every record of one schema
/// shares it, so a batch does not serialize it again nor a read parse it again.
#[derive(Default)]
pub struct LayoutCache(Mutex<Option<KnownLayout>>);

/// A layout and its stored bytes.
type KnownLayout = (Arc<FeatureLayout>, Arc<[u8]>);

impl LayoutCache {
    /// The stored bytes of `layout`.
    pub fn bytes_of(&self, layout: &Arc<FeatureLayout>) -> Arc<[u8]> {
        let mut last = self.0.lock().unwrap_or_else(|e| e.into_inner());
        match &*last {
            Some((known, bytes)) if Arc::ptr_eq(known, layout) || known == layout => {
                Arc::clone(bytes)
            }
            _ => {
                let bytes: Arc<[u8]> = layout.to_bytes().into();
                *last = Some((Arc::clone(layout), Arc::clone(&bytes)));
                bytes
            }
        }
    }

    /// The layout stored as `bytes`; `None` if they are not one.
    pub fn layout_of(&self, bytes: &[u8]) -> Option<Arc<FeatureLayout>> {
        let mut last = self.0.lock().unwrap_or_else(|e| e.into_inner());
        if let Some((layout, known)) = &*last {
            if **known == *bytes {
                return Some(Arc::clone(layout));
            }
        }
        let layout = Arc::new(FeatureLayout::from_bytes(bytes)?);
        *last = Some((Arc::clone(&layout), bytes.into()));
        Some(layout)
    }
}

/// A record's features: the text as sent, or the validated values and their layout.
#[derive(Debug, Clone)]
pub enum RecordedFeatures {
    /// The features object's JSON text as sent.
    Text(Box<RawValue>),
    /// Every feature as sent, validated, in schema order (no value is `Missing`).
    Values {
        values: Row,
        layout: Arc<FeatureLayout>,
    },
}

impl From<Box<RawValue>> for RecordedFeatures {
    fn from(text: Box<RawValue>) -> Self {
        RecordedFeatures::Text(text)
    }
}

impl RecordedFeatures {
    /// The features as a JSON object's text.
    pub fn to_json_string(&self) -> String {
        match self {
            RecordedFeatures::Text(text) => text.get().to_owned(),
            RecordedFeatures::Values { .. } => {
                serde_json::to_string(self).expect("recorded features serialize")
            }
        }
    }
}

impl Serialize for RecordedFeatures {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        match self {
            RecordedFeatures::Text(text) => text.serialize(serializer),
            RecordedFeatures::Values { values, layout } => {
                let mut map = serializer.serialize_map(Some(values.len()))?;
                for (j, value) in values.values().enumerate() {
                    let name = &layout.names[j];
                    match value {
                        Value::Number(v) => map.serialize_entry(name, &v)?,
                        Value::Category(i) => {
                            map.serialize_entry(name, &layout.categories[j][i as usize])?
                        }
                        Value::Missing => map.serialize_entry(name, &())?,
                    }
                }
                map.end()
            }
        }
    }
}

impl<'de> Deserialize<'de> for RecordedFeatures {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        Box::<RawValue>::deserialize(deserializer).map(RecordedFeatures::Text)
    }
}

/// The on-disk word of one value: a number's `f64` bits (always finite), or a category's
/// index under a quiet-NaN tag no finite number has.
const CATEGORY_WORD: u64 = 0x7FF9_0000_0000_0000;
const TAG_MASK: u64 = 0xFFFF_0000_0000_0000;

/// Appends the values' words, little-endian; `None` if a value cannot be stored as a word
/// (a `Missing`, a non-finite number).
pub fn encode_values(values: &Row, out: &mut Vec<u8>) -> Option<()> {
    out.reserve(values.len() * 8);
    for value in values.values() {
        let word = match value {
            Value::Number(v) if v.is_finite() => v.to_bits(),
            Value::Category(i) => CATEGORY_WORD | u64::from(i),
            _ => return None,
        };
        out.extend_from_slice(&word.to_le_bytes());
    }
    Some(())
}

/// Reads back [`encode_values`]' words against a layout; `None` if the bytes are not one
/// value per feature, or a category index is beyond the feature's categories.
pub fn decode_values(bytes: &[u8], layout: &FeatureLayout) -> Option<Row> {
    if bytes.len() != layout.len() * 8 {
        return None;
    }
    bytes
        .chunks_exact(8)
        .zip(&layout.categories)
        .map(|(chunk, categories)| {
            let word = u64::from_le_bytes(chunk.try_into().expect("8 bytes"));
            if word & TAG_MASK == CATEGORY_WORD {
                let i = word as u32;
                ((i as usize) < categories.len()).then_some(Value::Category(i))
            } else {
                let v = f64::from_bits(word);
                v.is_finite().then_some(Value::Number(v))
            }
        })
        .collect::<Option<Vec<Value>>>()
        .map(Row::from)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn layout() -> FeatureLayout {
        FeatureLayout {
            names: vec!["amount".into(), "channel".into(), "tenure".into()],
            categories: vec![vec![], vec!["web".into(), "branch".into()], vec![]],
        }
    }

    #[test]
    fn values_render_as_the_object_that_was_sent() {
        let values = Row::from(vec![
            Value::Number(1250.5),
            Value::Category(1),
            Value::Number(-3.0),
        ]);
        let recorded = RecordedFeatures::Values {
            values,
            layout: Arc::new(layout()),
        };
        assert_eq!(
            recorded.to_json_string(),
            r#"{"amount":1250.5,"channel":"branch","tenure":-3.0}"#
        );
        // Key order and spelling aside (`1.2505e3`), the same object; an integer reads back as
        // the float of the same value (`-3` as `-3.0`), as every reader parses it anyway.
        let sent: serde_json::Value =
            serde_json::from_str(r#"{"tenure": -3.0, "channel": "branch", "amount": 1.2505e3}"#)
                .unwrap();
        assert_eq!(serde_json::to_value(&recorded).unwrap(), sent);
    }

    #[test]
    fn text_stays_as_sent() {
        let text = RawValue::from_string(r#"{ "amount": 1e2 }"#.into()).unwrap();
        let recorded = RecordedFeatures::from(text);
        assert_eq!(recorded.to_json_string(), r#"{ "amount": 1e2 }"#);
        assert_eq!(
            serde_json::to_string(&recorded).unwrap(),
            r#"{ "amount": 1e2 }"#
        );
    }

    #[test]
    fn words_read_back_and_damaged_words_are_refused() {
        let layout = layout();
        let values = Row::from(vec![
            Value::Number(-0.0),
            Value::Category(0),
            Value::Number(f64::MAX),
        ]);
        let mut bytes = Vec::new();
        encode_values(&values, &mut bytes).unwrap();
        assert_eq!(bytes.len(), 24);
        let back = decode_values(&bytes, &layout).unwrap();
        assert_eq!(
            back.values().collect::<Vec<_>>(),
            values.values().collect::<Vec<_>>()
        );
        // One word short, a category beyond the list, a NaN number.
        assert!(decode_values(&bytes[..16], &layout).is_none());
        let mut beyond = bytes.clone();
        beyond[8..16].copy_from_slice(&(CATEGORY_WORD | 2).to_le_bytes());
        assert!(decode_values(&beyond, &layout).is_none());
        let mut nan = bytes;
        nan[0..8].copy_from_slice(&f64::NAN.to_bits().to_le_bytes());
        assert!(decode_values(&nan, &layout).is_none());
        // A missing value is never stored as a word.
        let missing = Row::from(vec![Value::Missing, Value::Category(0), Value::Number(1.0)]);
        assert!(encode_values(&missing, &mut Vec::new()).is_none());
    }

    #[test]
    fn a_layout_reads_back_and_a_lopsided_one_is_refused() {
        let layout = layout();
        assert_eq!(FeatureLayout::from_bytes(&layout.to_bytes()), Some(layout));
        assert_eq!(
            FeatureLayout::from_bytes(br#"{"names":["a"],"categories":[]}"#),
            None
        );
        assert_eq!(FeatureLayout::from_bytes(b"not json"), None);
    }
}
