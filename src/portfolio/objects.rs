//! Request objects that are objects only. serde's derived `Deserialize` for a struct also accepts a JSON array
//! of the fields in declaration order (`"portfolio": [[0.1, 0.2]]` would be read as its probabilities), which
//! the OpenAPI document does not allow and a client would never mean. `objects_only!` gives a struct that
//! derives with `#[serde(remote = "Self")]` (so the derived code becomes inherent functions) the trait impls
//! back, with `Deserialize` taking a JSON object and nothing else.

/// `objects_only!(Type)` for a struct deriving `Deserialize, Serialize` under `#[serde(remote = "Self")]`;
/// `objects_only!(Type, deserialize_only)` for one deriving only `Deserialize`.
macro_rules! objects_only {
    ($ty:ident) => {
        $crate::portfolio::objects::objects_only!($ty, deserialize_only);
        impl serde::Serialize for $ty {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                $ty::serialize(self, s)
            }
        }
    };
    ($ty:ident, deserialize_only) => {
        impl<'de> serde::Deserialize<'de> for $ty {
            fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
                struct Objects;
                impl<'de> serde::de::Visitor<'de> for Objects {
                    type Value = $ty;
                    fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                        write!(f, "an object ({})", stringify!($ty))
                    }
                    fn visit_map<A: serde::de::MapAccess<'de>>(self, map: A) -> Result<$ty, A::Error> {
                        $ty::deserialize(serde::de::value::MapAccessDeserializer::new(map))
                    }
                }
                d.deserialize_map(Objects)
            }
        }
    };
}
pub(crate) use objects_only;

#[cfg(test)]
mod tests {
    use serde::{Deserialize, Serialize};

    #[derive(Debug, PartialEq, Deserialize, Serialize)]
    #[serde(remote = "Self", deny_unknown_fields)]
    struct Pair {
        a: f64,
        #[serde(default)]
        b: Option<f64>,
    }
    objects_only!(Pair);

    #[test]
    fn objects_are_read_and_arrays_refused() {
        let p: Pair = serde_json::from_str(r#"{"a": 1.5}"#).unwrap();
        assert_eq!(p, Pair { a: 1.5, b: None });
        assert_eq!(serde_json::to_string(&p).unwrap(), r#"{"a":1.5,"b":null}"#);
        let e = serde_json::from_str::<Pair>("[1.5, 2.0]").unwrap_err().to_string();
        assert!(e.contains("invalid type: sequence, expected an object (Pair)"), "{e}");
        assert!(serde_json::from_str::<Pair>(r#"{"a": 1, "c": 2}"#).is_err(), "unknown fields still refused");
    }
}
