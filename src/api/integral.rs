//! Integral numbers written with a fraction or an exponent (`12.0`, `1e3`) read as integers. JSON has one number
//! type, and JSON Schema's `integer` is "a number with no fractional part" (JSON Schema Validation, draft
//! 2020-12, section 6.1.1: 1.0 is an integer), so `{"threshold": 12.0}` is valid against the published document
//! and generated clients may write it; serde's integer visitors refuse a float. `Integral` wraps a deserializer
//! and turns every float with no fractional part that an integer type can hold into that integer before any
//! visitor sees it. A float field loses nothing (its visitor takes the integer back exactly, every such value
//! being a float already), and values buffered for a tagged enum are turned too, since the buffering visitor
//! is wrapped like any other.
//!
//! What it is not: a number parser. Fractional values, values beyond 64 bits, strings and the shape of the
//! document reach the visitors as they are, so their errors are serde's own.

use serde::de::{self, DeserializeSeed, Deserializer, EnumAccess, MapAccess, SeqAccess, VariantAccess, Visitor};
use std::fmt;

/// A deserializer whose integral floats are read as integers.
pub struct Integral<D>(pub D);

/// 2^64 and -2^63: the floats from which u64 and i64 stop holding the value.
const U64_END: f64 = 18_446_744_073_709_551_616.0;
const I64_START: f64 = -9_223_372_036_854_775_808.0;

macro_rules! forward {
    ($($method:ident)*) => {$(
        fn $method<V: Visitor<'de>>(self, visitor: V) -> Result<V::Value, D::Error> {
            self.0.$method(Wrap(visitor))
        }
    )*};
}

impl<'de, D: Deserializer<'de>> Deserializer<'de> for Integral<D> {
    type Error = D::Error;

    forward! {
        deserialize_any deserialize_bool deserialize_i8 deserialize_i16 deserialize_i32 deserialize_i64
        deserialize_i128 deserialize_u8 deserialize_u16 deserialize_u32 deserialize_u64 deserialize_u128
        deserialize_f32 deserialize_f64 deserialize_char deserialize_str deserialize_string deserialize_bytes
        deserialize_byte_buf deserialize_option deserialize_unit deserialize_seq deserialize_map
        deserialize_identifier deserialize_ignored_any
    }

    fn deserialize_unit_struct<V: Visitor<'de>>(self, name: &'static str, visitor: V) -> Result<V::Value, D::Error> {
        self.0.deserialize_unit_struct(name, Wrap(visitor))
    }
    fn deserialize_newtype_struct<V: Visitor<'de>>(self, name: &'static str, visitor: V) -> Result<V::Value, D::Error> {
        self.0.deserialize_newtype_struct(name, Wrap(visitor))
    }
    fn deserialize_tuple<V: Visitor<'de>>(self, len: usize, visitor: V) -> Result<V::Value, D::Error> {
        self.0.deserialize_tuple(len, Wrap(visitor))
    }
    fn deserialize_tuple_struct<V: Visitor<'de>>(
        self,
        name: &'static str,
        len: usize,
        visitor: V,
    ) -> Result<V::Value, D::Error> {
        self.0.deserialize_tuple_struct(name, len, Wrap(visitor))
    }
    fn deserialize_struct<V: Visitor<'de>>(
        self,
        name: &'static str,
        fields: &'static [&'static str],
        visitor: V,
    ) -> Result<V::Value, D::Error> {
        self.0.deserialize_struct(name, fields, Wrap(visitor))
    }
    fn deserialize_enum<V: Visitor<'de>>(
        self,
        name: &'static str,
        variants: &'static [&'static str],
        visitor: V,
    ) -> Result<V::Value, D::Error> {
        self.0.deserialize_enum(name, variants, Wrap(visitor))
    }
    fn is_human_readable(&self) -> bool {
        self.0.is_human_readable()
    }
}

/// A visitor that turns integral floats into integers and wraps what it is handed to read further.
struct Wrap<V>(V);

macro_rules! pass {
    ($($method:ident: $t:ty)*) => {$(
        fn $method<E: de::Error>(self, v: $t) -> Result<V::Value, E> {
            self.0.$method(v)
        }
    )*};
}

impl<'de, V: Visitor<'de>> Visitor<'de> for Wrap<V> {
    type Value = V::Value;

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        self.0.expecting(f)
    }

    fn visit_f64<E: de::Error>(self, v: f64) -> Result<V::Value, E> {
        if v.fract() == 0.0 && (0.0..U64_END).contains(&v) {
            self.0.visit_u64(v as u64)
        } else if v.fract() == 0.0 && (I64_START..0.0).contains(&v) {
            self.0.visit_i64(v as i64)
        } else {
            self.0.visit_f64(v)
        }
    }

    fn visit_f32<E: de::Error>(self, v: f32) -> Result<V::Value, E> {
        self.visit_f64(f64::from(v))
    }

    pass! {
        visit_bool: bool visit_i8: i8 visit_i16: i16 visit_i32: i32 visit_i64: i64 visit_i128: i128
        visit_u8: u8 visit_u16: u16 visit_u32: u32 visit_u64: u64 visit_u128: u128 visit_char: char
        visit_str: &str visit_borrowed_str: &'de str visit_string: String visit_bytes: &[u8]
        visit_borrowed_bytes: &'de [u8] visit_byte_buf: Vec<u8>
    }

    fn visit_none<E: de::Error>(self) -> Result<V::Value, E> {
        self.0.visit_none()
    }
    fn visit_unit<E: de::Error>(self) -> Result<V::Value, E> {
        self.0.visit_unit()
    }
    fn visit_some<D: Deserializer<'de>>(self, d: D) -> Result<V::Value, D::Error> {
        self.0.visit_some(Integral(d))
    }
    fn visit_newtype_struct<D: Deserializer<'de>>(self, d: D) -> Result<V::Value, D::Error> {
        self.0.visit_newtype_struct(Integral(d))
    }
    fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<V::Value, A::Error> {
        self.0.visit_seq(Integral(seq))
    }
    fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<V::Value, A::Error> {
        self.0.visit_map(Integral(map))
    }
    fn visit_enum<A: EnumAccess<'de>>(self, data: A) -> Result<V::Value, A::Error> {
        self.0.visit_enum(Integral(data))
    }
}

impl<'de, T: DeserializeSeed<'de>> DeserializeSeed<'de> for Integral<T> {
    type Value = T::Value;
    fn deserialize<D: Deserializer<'de>>(self, d: D) -> Result<T::Value, D::Error> {
        self.0.deserialize(Integral(d))
    }
}

impl<'de, A: SeqAccess<'de>> SeqAccess<'de> for Integral<A> {
    type Error = A::Error;
    fn next_element_seed<T: DeserializeSeed<'de>>(&mut self, seed: T) -> Result<Option<T::Value>, A::Error> {
        self.0.next_element_seed(Integral(seed))
    }
    fn size_hint(&self) -> Option<usize> {
        self.0.size_hint()
    }
}

impl<'de, A: MapAccess<'de>> MapAccess<'de> for Integral<A> {
    type Error = A::Error;
    fn next_key_seed<K: DeserializeSeed<'de>>(&mut self, seed: K) -> Result<Option<K::Value>, A::Error> {
        self.0.next_key_seed(Integral(seed))
    }
    fn next_value_seed<T: DeserializeSeed<'de>>(&mut self, seed: T) -> Result<T::Value, A::Error> {
        self.0.next_value_seed(Integral(seed))
    }
    fn size_hint(&self) -> Option<usize> {
        self.0.size_hint()
    }
}

impl<'de, A: EnumAccess<'de>> EnumAccess<'de> for Integral<A> {
    type Error = A::Error;
    type Variant = Integral<A::Variant>;
    fn variant_seed<T: DeserializeSeed<'de>>(self, seed: T) -> Result<(T::Value, Self::Variant), A::Error> {
        self.0.variant_seed(Integral(seed)).map(|(v, rest)| (v, Integral(rest)))
    }
}

impl<'de, A: VariantAccess<'de>> VariantAccess<'de> for Integral<A> {
    type Error = A::Error;
    fn unit_variant(self) -> Result<(), A::Error> {
        self.0.unit_variant()
    }
    fn newtype_variant_seed<T: DeserializeSeed<'de>>(self, seed: T) -> Result<T::Value, A::Error> {
        self.0.newtype_variant_seed(Integral(seed))
    }
    fn tuple_variant<V: Visitor<'de>>(self, len: usize, visitor: V) -> Result<V::Value, A::Error> {
        self.0.tuple_variant(len, Wrap(visitor))
    }
    fn struct_variant<V: Visitor<'de>>(
        self,
        fields: &'static [&'static str],
        visitor: V,
    ) -> Result<V::Value, A::Error> {
        self.0.struct_variant(fields, Wrap(visitor))
    }
}

#[cfg(test)]
mod tests {
    use super::Integral;
    use serde::Deserialize;

    fn read<T: for<'de> Deserialize<'de>>(json: &str) -> Result<T, String> {
        T::deserialize(Integral(&mut serde_json::Deserializer::from_str(json))).map_err(|e| e.to_string())
    }

    #[derive(Debug, PartialEq, Deserialize)]
    #[serde(tag = "kind", rename_all = "snake_case")]
    enum Tagged {
        Count { n: u64, p: f64 },
    }

    #[test]
    fn integral_floats_read_as_integers_everywhere() {
        assert_eq!(read::<u64>("12.0"), Ok(12));
        assert_eq!(read::<u64>("1e3"), Ok(1000));
        assert_eq!(read::<u32>("160.0"), Ok(160));
        assert_eq!(read::<i64>("-4.0"), Ok(-4));
        assert_eq!(read::<Vec<u64>>("[1.0, 2, 3e0]"), Ok(vec![1, 2, 3]));
        assert_eq!(read::<Option<u64>>("7.0"), Ok(Some(7)));
        // Buffered for a tagged enum, then read: the buffering visitor is wrapped too.
        assert_eq!(read::<Tagged>(r#"{"n": 5.0, "kind": "count", "p": 1.0}"#), Ok(Tagged::Count { n: 5, p: 1.0 }));
    }

    #[test]
    fn floats_keep_their_values_and_other_errors_stay_serdes() {
        assert_eq!(read::<f64>("12.0"), Ok(12.0));
        assert_eq!(read::<f64>("0.25"), Ok(0.25));
        assert_eq!(read::<f64>("1e300"), Ok(1e300));
        assert_eq!(read::<f64>("9007199254740993.0"), Ok(9007199254740992.0));
        assert!(read::<u64>("12.5").unwrap_err().contains("invalid type: floating point `12.5`, expected u64"));
        assert!(read::<u64>("-1.0").unwrap_err().contains("invalid value: integer `-1`, expected u64"));
        assert!(read::<u64>("1e20").unwrap_err().contains("expected u64"));
        assert!(read::<u32>("5e9").unwrap_err().contains("expected u32"));
        assert!(read::<u64>("\"3\"").unwrap_err().contains("invalid type: string"));
    }
}
