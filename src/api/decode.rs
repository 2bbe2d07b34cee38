//! `from_slice`: the first reader of a JSON request, one pass over the bytes with the numbers converted where
//! they are scanned. serde_json (with `float_roundtrip`) spends most of a long list of probabilities in its
//! number conversion; this reader takes Clinger's exact fast path where it applies (W. D. Clinger, 1990, "How
//! to read floating point numbers accurately": a significand of at most 2^53 times or over a power of ten of
//! at most 10^22 is one correctly rounded IEEE operation), else Eisel-Lemire for up to 19 digits at the
//! exponents a probability has (`eisel_lemire`), else the standard library's correctly rounded parser, so
//! every double is the one serde_json reads, bit for bit.
//!
//! It reads valid documents only. Anything it does not accept (a syntax error, a value of the wrong type, a
//! number out of range, a 128-bit integer, a raw value, nesting past serde_json's limit) makes it give up with
//! no message, and `extract::parse` reads the document again with serde_json, whose errors and pointers the
//! problems carry. So it must never accept what serde_json refuses, and must read what both accept into the
//! same value: strings are checked as serde_json checks them (UTF-8, escapes, surrogate pairs, no control
//! characters), integers become `u64`, `i64` or `f64` by serde_json's rules (`-0` is the float -0.0), and
//! borrowed strings are handed over borrowed, escaped ones as copies.

use serde::de::value::{BorrowedStrDeserializer, StrDeserializer};
use serde::de::{self, DeserializeSeed, Deserializer, EnumAccess, MapAccess, SeqAccess, VariantAccess, Visitor};
use serde::Deserialize;
use std::fmt;

/// `T` read from `input`, or `None` where serde_json must read it (see the module's note).
pub fn from_slice<'de, T: Deserialize<'de>>(input: &'de [u8]) -> Option<T> {
    let mut r = Reader { input, pos: 0, depth: DEPTH };
    let value = T::deserialize(&mut r).ok()?;
    r.skip_ws();
    (r.pos == input.len()).then_some(value)
}

/// serde_json's nesting limit (arrays, objects and enum objects together: at most 127 deep).
const DEPTH: u32 = 128;

/// The one error: give up, serde_json says why.
#[derive(Debug)]
pub struct GiveUp;

impl fmt::Display for GiveUp {
    fn fmt(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("not read by the fast reader")
    }
}

impl std::error::Error for GiveUp {}

impl de::Error for GiveUp {
    fn custom<T: fmt::Display>(_: T) -> Self {
        GiveUp
    }
}

type Res<T> = Result<T, GiveUp>;

struct Reader<'de> {
    input: &'de [u8],
    pos: usize,
    depth: u32,
}

enum Num {
    U64(u64),
    I64(i64),
    F64(f64),
}

enum Text<'de> {
    Borrowed(&'de str),
    Owned(String),
}

/// 10^0 to 10^22: the powers of ten that are exact doubles.
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20,
    1e21, 1e22,
];

/// Exponents of ten read by `eisel_lemire` (outside, the standard library's parser): a probability of up to
/// 19 digits down to 10^-8 lies within.
const EL_MIN: i64 = -27;
const EL_MAX: i64 = 27;

/// 5^q for q in `EL_MIN..=EL_MAX`, as (high, low) 64-bit words of a 128-bit number whose top bit is set: for
/// q >= 0, 5^q shifted left (exact); for q < 0, floor(2^(b + 127) / 5^-q) + 1 with 2^(b - 1) < 5^-q < 2^b
/// (the table of Lemire 2021 for these q; `tests::the_table_of_powers_of_five` recomputes it in exact
/// integers).
const POW5: [(u64, u64); 55] = [
    (0x9e74d1b791e07e48, 0x775ea264cf55347e),
    (0xc612062576589dda, 0x95364afe032a819e),
    (0xf79687aed3eec551, 0x3a83ddbd83f52205),
    (0x9abe14cd44753b52, 0xc4926a9672793543),
    (0xc16d9a0095928a27, 0x75b7053c0f178294),
    (0xf1c90080baf72cb1, 0x5324c68b12dd6339),
    (0x971da05074da7bee, 0xd3f6fc16ebca5e04),
    (0xbce5086492111aea, 0x88f4bb1ca6bcf585),
    (0xec1e4a7db69561a5, 0x2b31e9e3d06c32e6),
    (0x9392ee8e921d5d07, 0x3aff322e62439fd0),
    (0xb877aa3236a4b449, 0x09befeb9fad487c3),
    (0xe69594bec44de15b, 0x4c2ebe687989a9b4),
    (0x901d7cf73ab0acd9, 0x0f9d37014bf60a11),
    (0xb424dc35095cd80f, 0x538484c19ef38c95),
    (0xe12e13424bb40e13, 0x2865a5f206b06fba),
    (0x8cbccc096f5088cb, 0xf93f87b7442e45d4),
    (0xafebff0bcb24aafe, 0xf78f69a51539d749),
    (0xdbe6fecebdedd5be, 0xb573440e5a884d1c),
    (0x89705f4136b4a597, 0x31680a88f8953031),
    (0xabcc77118461cefc, 0xfdc20d2b36ba7c3e),
    (0xd6bf94d5e57a42bc, 0x3d32907604691b4d),
    (0x8637bd05af6c69b5, 0xa63f9a49c2c1b110),
    (0xa7c5ac471b478423, 0x0fcf80dc33721d54),
    (0xd1b71758e219652b, 0xd3c36113404ea4a9),
    (0x83126e978d4fdf3b, 0x645a1cac083126ea),
    (0xa3d70a3d70a3d70a, 0x3d70a3d70a3d70a4),
    (0xcccccccccccccccc, 0xcccccccccccccccd),
    (0x8000000000000000, 0x0000000000000000),
    (0xa000000000000000, 0x0000000000000000),
    (0xc800000000000000, 0x0000000000000000),
    (0xfa00000000000000, 0x0000000000000000),
    (0x9c40000000000000, 0x0000000000000000),
    (0xc350000000000000, 0x0000000000000000),
    (0xf424000000000000, 0x0000000000000000),
    (0x9896800000000000, 0x0000000000000000),
    (0xbebc200000000000, 0x0000000000000000),
    (0xee6b280000000000, 0x0000000000000000),
    (0x9502f90000000000, 0x0000000000000000),
    (0xba43b74000000000, 0x0000000000000000),
    (0xe8d4a51000000000, 0x0000000000000000),
    (0x9184e72a00000000, 0x0000000000000000),
    (0xb5e620f480000000, 0x0000000000000000),
    (0xe35fa931a0000000, 0x0000000000000000),
    (0x8e1bc9bf04000000, 0x0000000000000000),
    (0xb1a2bc2ec5000000, 0x0000000000000000),
    (0xde0b6b3a76400000, 0x0000000000000000),
    (0x8ac7230489e80000, 0x0000000000000000),
    (0xad78ebc5ac620000, 0x0000000000000000),
    (0xd8d726b7177a8000, 0x0000000000000000),
    (0x878678326eac9000, 0x0000000000000000),
    (0xa968163f0a57b400, 0x0000000000000000),
    (0xd3c21bcecceda100, 0x0000000000000000),
    (0x84595161401484a0, 0x0000000000000000),
    (0xa56fa5b99019a5c8, 0x0000000000000000),
    (0xcecb8f27f4200f3a, 0x0000000000000000),
];

/// The double nearest to w * 10^q (ties to even), for w < 10^19 with every digit kept and q in
/// `EL_MIN..=EL_MAX`: D. Lemire, 2021, "Number parsing at a gigabyte per second" (Software: Practice and
/// Experience), with its rounding of ties to even; within this range of q the one ambiguous case (the low
/// product word all ones) rounds correctly without a fallback, as that paper shows (and N. Mushtak and D.
/// Lemire, 2023, "Fast number parsing without fallback", for every q). The answers are compared with
/// serde_json's, bit for bit, in `tests`.
fn eisel_lemire(w: u64, q: i64) -> f64 {
    debug_assert!((EL_MIN..=EL_MAX).contains(&q));
    if w == 0 {
        return 0.0;
    }
    let lz = w.leading_zeros();
    let w = w << lz;
    let (hi5, lo5) = POW5[(q - EL_MIN) as usize];
    // The product's top 64 bits hold 54 bits of mantissa, a rounding bit and a possible leading zero; a
    // second product of the low words is needed only when the bits below them are all ones.
    let first = u128::from(w) * u128::from(hi5);
    let (mut lo, mut hi) = (first as u64, (first >> 64) as u64);
    const MASK: u64 = u64::MAX >> 55;
    if hi & MASK == MASK {
        let second_hi = ((u128::from(w) * u128::from(lo5)) >> 64) as u64;
        lo = lo.wrapping_add(second_hi);
        if second_hi > lo {
            hi += 1;
        }
    }
    let upper = (hi >> 63) as i32;
    let mut mantissa = hi >> (upper + 64 - 52 - 3);
    // floor(q log2(10)) + 63, biased by the least normal exponent.
    let mut power2 = (((q as i32).wrapping_mul(152_170 + 65_536)) >> 16) + 63 + upper - lz as i32 + 1023;
    if power2 <= 0 {
        // Below the normal range (not reached for q >= EL_MIN, kept for a whole algorithm).
        if -power2 + 1 >= 64 {
            return 0.0;
        }
        mantissa >>= -power2 + 1;
        mantissa += mantissa & 1;
        mantissa >>= 1;
        let e = u64::from(mantissa >= 1 << 52);
        return f64::from_bits((e << 52) | (mantissa & ((1 << 52) - 1)));
    }
    // Exactly halfway between two doubles (possible only for small q, where 5^q is exact): to even.
    if lo <= 1 && (-4..=23).contains(&q) && mantissa & 3 == 1 && (mantissa << (upper + 64 - 52 - 3)) == hi {
        mantissa &= !1;
    }
    mantissa += mantissa & 1;
    mantissa >>= 1;
    if mantissa >= 2 << 52 {
        mantissa = 1 << 52;
        power2 += 1;
    }
    mantissa &= !(1 << 52);
    // power2 < 0x7ff: q <= 27 with w < 10^19 is far below the largest double.
    f64::from_bits(((power2 as u64) << 52) | mantissa)
}

impl<'de> Reader<'de> {
    #[inline]
    fn peek(&self) -> Option<u8> {
        self.input.get(self.pos).copied()
    }

    #[inline]
    fn skip_ws(&mut self) {
        while let Some(b' ' | b'\n' | b'\t' | b'\r') = self.peek() {
            self.pos += 1;
        }
    }

    #[inline]
    fn next_ws(&mut self) -> Option<u8> {
        self.skip_ws();
        self.peek()
    }

    fn literal(&mut self, word: &[u8]) -> Res<()> {
        if self.input[self.pos..].starts_with(word) {
            self.pos += word.len();
            Ok(())
        } else {
            Err(GiveUp)
        }
    }

    fn enter(&mut self) -> Res<()> {
        self.depth -= 1;
        if self.depth == 0 {
            return Err(GiveUp);
        }
        self.pos += 1;
        Ok(())
    }

    fn close(&mut self, end: u8) -> Res<()> {
        self.depth += 1;
        if self.next_ws() == Some(end) {
            self.pos += 1;
            Ok(())
        } else {
            Err(GiveUp)
        }
    }

    /// A number by JSON's grammar, `-?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?`, as serde_json reads it.
    fn number(&mut self) -> Res<Num> {
        let b = self.input;
        let start = self.pos;
        let mut i = start;
        let neg = b.get(i) == Some(&b'-');
        if neg {
            i += 1;
        }
        // The first 19 digits in `m` (any 19 digits fit in a u64); `long` once there are more.
        let mut m: u64 = 0;
        let mut digits = 0u32;
        let mut long = false;
        match b.get(i) {
            Some(b'0') => {
                i += 1;
                if matches!(b.get(i), Some(b'0'..=b'9')) {
                    return Err(GiveUp);
                }
            }
            Some(b'1'..=b'9') => {
                while let Some(&c @ b'0'..=b'9') = b.get(i) {
                    if digits < 19 {
                        m = m * 10 + u64::from(c - b'0');
                        digits += 1;
                    } else {
                        long = true;
                    }
                    i += 1;
                }
            }
            _ => return Err(GiveUp),
        }
        let int_end = i;
        let mut float = false;
        let mut exp10: i64 = 0;
        if b.get(i) == Some(&b'.') {
            float = true;
            i += 1;
            let first = i;
            // Eight digits at a time while they fit (a probability's 16 to 18 are most of its bytes).
            while digits <= 11 {
                let Some(eight) = eight_digits(b, i) else { break };
                m = m * 100_000_000 + eight;
                digits += 8;
                exp10 -= 8;
                i += 8;
            }
            while let Some(&c @ b'0'..=b'9') = b.get(i) {
                if digits < 19 {
                    m = m * 10 + u64::from(c - b'0');
                    digits += 1;
                    exp10 -= 1;
                } else {
                    long = true;
                }
                i += 1;
            }
            if i == first {
                return Err(GiveUp);
            }
        }
        if let Some(b'e' | b'E') = b.get(i) {
            float = true;
            i += 1;
            let eneg = match b.get(i) {
                Some(b'-') => {
                    i += 1;
                    true
                }
                Some(b'+') => {
                    i += 1;
                    false
                }
                _ => false,
            };
            let first = i;
            let mut e: i64 = 0;
            while let Some(&c @ b'0'..=b'9') = b.get(i) {
                // Past 10^6 the value is 0 or out of range either way; the standard parser decides which.
                e = (e * 10 + i64::from(c - b'0')).min(1_000_000);
                i += 1;
            }
            if i == first {
                return Err(GiveUp);
            }
            exp10 += if eneg { -e } else { e };
        }
        self.pos = i;
        // ASCII by construction (no check needed, but the standard parser is reached rarely).
        let text = || std::str::from_utf8(&b[start..i]).map_err(|_| GiveUp);
        if !float {
            let magnitude = if long { text()?[usize::from(neg)..int_end - start].parse::<u64>().ok() } else { Some(m) };
            if let Some(s) = magnitude {
                return Ok(if !neg {
                    Num::U64(s)
                } else {
                    // serde_json's rule: below i64::MIN, and -0, are floats.
                    let n = (s as i64).wrapping_neg();
                    if n >= 0 {
                        Num::F64(-(s as f64))
                    } else {
                        Num::I64(n)
                    }
                });
            }
        }
        let x = if !long && m <= 1 << 53 && (-22..=22).contains(&exp10) {
            let x = m as f64;
            let x = if exp10 < 0 { x / POW10[(-exp10) as usize] } else { x * POW10[exp10 as usize] };
            if neg {
                -x
            } else {
                x
            }
        } else if !long && (EL_MIN..=EL_MAX).contains(&exp10) {
            let x = eisel_lemire(m, exp10);
            if neg {
                -x
            } else {
                x
            }
        } else {
            text()?.parse::<f64>().map_err(|_| GiveUp)?
        };
        if x.is_finite() {
            Ok(Num::F64(x))
        } else {
            Err(GiveUp)
        }
    }

    /// A string (at its opening quote), borrowed unless it has escapes.
    fn string(&mut self) -> Res<Text<'de>> {
        let b = self.input;
        let start = self.pos + 1;
        let mut i = start;
        loop {
            match b.get(i) {
                Some(b'"') => {
                    self.pos = i + 1;
                    return std::str::from_utf8(&b[start..i]).map(Text::Borrowed).map_err(|_| GiveUp);
                }
                Some(b'\\') => break,
                Some(0..=0x1f) | None => return Err(GiveUp),
                Some(_) => i += 1,
            }
        }
        let mut out: Vec<u8> = b[start..i].to_vec();
        loop {
            match b.get(i) {
                Some(b'"') => {
                    self.pos = i + 1;
                    return String::from_utf8(out).map(Text::Owned).map_err(|_| GiveUp);
                }
                Some(b'\\') => {
                    let c = match b.get(i + 1) {
                        Some(b'"') => '"',
                        Some(b'\\') => '\\',
                        Some(b'/') => '/',
                        Some(b'b') => '\u{8}',
                        Some(b'f') => '\u{c}',
                        Some(b'n') => '\n',
                        Some(b'r') => '\r',
                        Some(b't') => '\t',
                        Some(b'u') => {
                            let hi = hex4(b, i + 2)?;
                            let (code, used) = match hi {
                                0xD800..=0xDBFF => {
                                    if b.get(i + 6) != Some(&b'\\') || b.get(i + 7) != Some(&b'u') {
                                        return Err(GiveUp);
                                    }
                                    let lo = hex4(b, i + 8)?;
                                    if !(0xDC00..=0xDFFF).contains(&lo) {
                                        return Err(GiveUp);
                                    }
                                    (0x10000 + ((hi - 0xD800) << 10) + (lo - 0xDC00), 12)
                                }
                                0xDC00..=0xDFFF => return Err(GiveUp),
                                _ => (hi, 6),
                            };
                            let c = char::from_u32(code).ok_or(GiveUp)?;
                            out.extend_from_slice(c.encode_utf8(&mut [0; 4]).as_bytes());
                            i += used;
                            continue;
                        }
                        _ => return Err(GiveUp),
                    };
                    out.extend_from_slice(c.encode_utf8(&mut [0; 4]).as_bytes());
                    i += 2;
                }
                Some(0..=0x1f) | None => return Err(GiveUp),
                Some(&c) => {
                    out.push(c);
                    i += 1;
                }
            }
        }
    }
}

/// The value of the eight bytes at `at` if all are ASCII digits (the eight-digit conversion within one 64-bit
/// word of Lemire 2021: one test for eight digits, three multiplications for their value).
#[inline]
fn eight_digits(b: &[u8], at: usize) -> Option<u64> {
    let chunk: [u8; 8] = b.get(at..at + 8)?.try_into().ok()?;
    let v = u64::from_le_bytes(chunk);
    let d = v.wrapping_sub(0x3030_3030_3030_3030);
    if (v.wrapping_add(0x4646_4646_4646_4646) | d) & 0x8080_8080_8080_8080 != 0 {
        return None;
    }
    // Pairs of digits, then fours, then the eight: each byte holds its digit, the first the most significant.
    let d = d.wrapping_mul(10).wrapping_add(d >> 8);
    const MASK: u64 = 0x0000_00FF_0000_00FF;
    const MUL1: u64 = 100 + (1_000_000 << 32);
    const MUL2: u64 = 1 + (10_000 << 32);
    let v = ((d & MASK).wrapping_mul(MUL1).wrapping_add(((d >> 16) & MASK).wrapping_mul(MUL2))) >> 32;
    Some(v & 0xFFFF_FFFF)
}

fn hex4(b: &[u8], at: usize) -> Res<u32> {
    let digits = b.get(at..at + 4).ok_or(GiveUp)?;
    let mut v = 0u32;
    for &d in digits {
        v = v * 16 + char::from(d).to_digit(16).ok_or(GiveUp)?;
    }
    Ok(v)
}

fn visit_num<'de, V: Visitor<'de>>(n: Num, visitor: V) -> Res<V::Value> {
    match n {
        Num::U64(v) => visitor.visit_u64(v),
        Num::I64(v) => visitor.visit_i64(v),
        Num::F64(v) => visitor.visit_f64(v),
    }
}

fn visit_text<'de, V: Visitor<'de>>(t: Text<'de>, visitor: V) -> Res<V::Value> {
    match t {
        Text::Borrowed(s) => visitor.visit_borrowed_str(s),
        Text::Owned(s) => visitor.visit_str(&s),
    }
}

macro_rules! numbers {
    ($($method:ident)*) => {$(
        fn $method<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
            match self.next_ws() {
                Some(b'-' | b'0'..=b'9') => visit_num(self.number()?, visitor),
                _ => Err(GiveUp),
            }
        }
    )*};
}

macro_rules! give_up {
    ($($method:ident)*) => {$(
        fn $method<V: Visitor<'de>>(self, _: V) -> Res<V::Value> {
            Err(GiveUp)
        }
    )*};
}

impl<'de> Reader<'de> {
    fn seq<V: Visitor<'de>>(&mut self, visitor: V) -> Res<V::Value> {
        self.enter()?;
        let hint = self.flat_len();
        let value = visitor.visit_seq(Seq { r: self, first: true, hint });
        let value = value?;
        self.close(b']')?;
        Ok(value)
    }

    /// The length of the list just opened, when it is a short flat one (numbers, literals: no strings, no
    /// nesting, its end within `HINTED` bytes), so that a `Vec` is allocated once at its size rather than
    /// grown through seven reallocations for 100 probabilities. A long list grows by doubling as before
    /// (its reallocations are few and cheap next to reading it).
    fn flat_len(&self) -> Option<usize> {
        const HINTED: usize = 1 << 16;
        let rest = &self.input[self.pos..];
        let rest = &rest[..rest.len().min(HINTED)];
        let end = memchr::memchr(b']', rest)?;
        let body = &rest[..end];
        if memchr::memchr3(b'[', b'{', b'"', body).is_some() {
            return None;
        }
        if body.iter().all(|c| matches!(c, b' ' | b'\n' | b'\t' | b'\r')) {
            return Some(0);
        }
        Some(memchr::memchr_iter(b',', body).count() + 1)
    }

    fn map<V: Visitor<'de>>(&mut self, visitor: V) -> Res<V::Value> {
        self.enter()?;
        let value = visitor.visit_map(Map { r: self, first: true })?;
        self.close(b'}')?;
        Ok(value)
    }
}

impl<'de> Deserializer<'de> for &mut Reader<'de> {
    type Error = GiveUp;

    fn deserialize_any<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'n') => {
                self.literal(b"null")?;
                visitor.visit_unit()
            }
            Some(b't') => {
                self.literal(b"true")?;
                visitor.visit_bool(true)
            }
            Some(b'f') => {
                self.literal(b"false")?;
                visitor.visit_bool(false)
            }
            Some(b'-' | b'0'..=b'9') => visit_num(self.number()?, visitor),
            Some(b'"') => visit_text(self.string()?, visitor),
            Some(b'[') => self.seq(visitor),
            Some(b'{') => self.map(visitor),
            _ => Err(GiveUp),
        }
    }

    numbers! {
        deserialize_i8 deserialize_i16 deserialize_i32 deserialize_i64 deserialize_u8 deserialize_u16
        deserialize_u32 deserialize_u64 deserialize_f64
    }

    // serde_json reads these its own way (f32 rounded once from the text, 128-bit integers in full).
    give_up! { deserialize_f32 deserialize_i128 deserialize_u128 deserialize_bytes deserialize_byte_buf }

    fn deserialize_bool<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        match self.next_ws() {
            Some(b't') => {
                self.literal(b"true")?;
                visitor.visit_bool(true)
            }
            Some(b'f') => {
                self.literal(b"false")?;
                visitor.visit_bool(false)
            }
            _ => Err(GiveUp),
        }
    }

    fn deserialize_str<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'"') => visit_text(self.string()?, visitor),
            _ => Err(GiveUp),
        }
    }

    fn deserialize_char<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        self.deserialize_str(visitor)
    }

    fn deserialize_string<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        self.deserialize_str(visitor)
    }

    fn deserialize_identifier<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        self.deserialize_str(visitor)
    }

    fn deserialize_option<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        if self.next_ws() == Some(b'n') {
            self.literal(b"null")?;
            visitor.visit_none()
        } else {
            visitor.visit_some(self)
        }
    }

    fn deserialize_unit<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        if self.next_ws() == Some(b'n') {
            self.literal(b"null")?;
            visitor.visit_unit()
        } else {
            Err(GiveUp)
        }
    }

    fn deserialize_unit_struct<V: Visitor<'de>>(self, _: &'static str, visitor: V) -> Res<V::Value> {
        self.deserialize_unit(visitor)
    }

    fn deserialize_newtype_struct<V: Visitor<'de>>(self, name: &'static str, visitor: V) -> Res<V::Value> {
        // serde_json's raw values are its own business.
        if name.starts_with("$serde_json") {
            return Err(GiveUp);
        }
        visitor.visit_newtype_struct(self)
    }

    fn deserialize_seq<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'[') => self.seq(visitor),
            _ => Err(GiveUp),
        }
    }

    fn deserialize_tuple<V: Visitor<'de>>(self, _: usize, visitor: V) -> Res<V::Value> {
        self.deserialize_seq(visitor)
    }

    fn deserialize_tuple_struct<V: Visitor<'de>>(self, _: &'static str, _: usize, visitor: V) -> Res<V::Value> {
        self.deserialize_seq(visitor)
    }

    fn deserialize_map<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'{') => self.map(visitor),
            _ => Err(GiveUp),
        }
    }

    /// serde_json reads a struct from an object or from an array of its fields.
    fn deserialize_struct<V: Visitor<'de>>(
        self,
        _: &'static str,
        _: &'static [&'static str],
        visitor: V,
    ) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'{') => self.map(visitor),
            Some(b'[') => self.seq(visitor),
            _ => Err(GiveUp),
        }
    }

    fn deserialize_enum<V: Visitor<'de>>(
        self,
        _: &'static str,
        _: &'static [&'static str],
        visitor: V,
    ) -> Res<V::Value> {
        match self.next_ws() {
            Some(b'"') => match self.string()? {
                Text::Borrowed(s) => visitor.visit_enum(BorrowedStrDeserializer::<GiveUp>::new(s)),
                Text::Owned(s) => visitor.visit_enum(StrDeserializer::<GiveUp>::new(&s)),
            },
            Some(b'{') => {
                self.enter()?;
                let value = visitor.visit_enum(Variant { r: self })?;
                self.close(b'}')?;
                Ok(value)
            }
            _ => Err(GiveUp),
        }
    }

    fn deserialize_ignored_any<V: Visitor<'de>>(self, visitor: V) -> Res<V::Value> {
        self.deserialize_any(de::IgnoredAny)?;
        visitor.visit_unit()
    }
}

struct Seq<'a, 'de> {
    r: &'a mut Reader<'de>,
    first: bool,
    /// The number of elements (`Reader::flat_len`), before the first is read.
    hint: Option<usize>,
}

impl<'de> SeqAccess<'de> for Seq<'_, 'de> {
    type Error = GiveUp;

    fn next_element_seed<T: DeserializeSeed<'de>>(&mut self, seed: T) -> Res<Option<T::Value>> {
        match self.r.next_ws() {
            Some(b']') => return Ok(None),
            Some(b',') if !self.first => self.r.pos += 1,
            _ if self.first => {}
            _ => return Err(GiveUp),
        }
        self.first = false;
        self.hint = None;
        seed.deserialize(&mut *self.r).map(Some)
    }

    fn size_hint(&self) -> Option<usize> {
        self.hint
    }
}

struct Map<'a, 'de> {
    r: &'a mut Reader<'de>,
    first: bool,
}

impl<'de> MapAccess<'de> for Map<'_, 'de> {
    type Error = GiveUp;

    fn next_key_seed<K: DeserializeSeed<'de>>(&mut self, seed: K) -> Res<Option<K::Value>> {
        match self.r.next_ws() {
            Some(b'}') => return Ok(None),
            Some(b',') if !self.first => {
                self.r.pos += 1;
                self.r.skip_ws();
            }
            _ if self.first => {}
            _ => return Err(GiveUp),
        }
        self.first = false;
        if self.r.peek() != Some(b'"') {
            return Err(GiveUp);
        }
        let key = match self.r.string()? {
            Text::Borrowed(s) => seed.deserialize(BorrowedStrDeserializer::<GiveUp>::new(s))?,
            Text::Owned(s) => seed.deserialize(StrDeserializer::<GiveUp>::new(&s))?,
        };
        if self.r.next_ws() != Some(b':') {
            return Err(GiveUp);
        }
        self.r.pos += 1;
        Ok(Some(key))
    }

    fn next_value_seed<T: DeserializeSeed<'de>>(&mut self, seed: T) -> Res<T::Value> {
        seed.deserialize(&mut *self.r)
    }
}

/// An enum written as an object of one member, `{"variant": value}`.
struct Variant<'a, 'de> {
    r: &'a mut Reader<'de>,
}

impl<'de> EnumAccess<'de> for Variant<'_, 'de> {
    type Error = GiveUp;
    type Variant = Self;

    fn variant_seed<T: DeserializeSeed<'de>>(self, seed: T) -> Res<(T::Value, Self)> {
        let tag = seed.deserialize(&mut *self.r)?;
        if self.r.next_ws() != Some(b':') {
            return Err(GiveUp);
        }
        self.r.pos += 1;
        Ok((tag, self))
    }
}

impl<'de> VariantAccess<'de> for Variant<'_, 'de> {
    type Error = GiveUp;

    fn unit_variant(self) -> Res<()> {
        <()>::deserialize(&mut *self.r)
    }

    fn newtype_variant_seed<T: DeserializeSeed<'de>>(self, seed: T) -> Res<T::Value> {
        seed.deserialize(&mut *self.r)
    }

    fn tuple_variant<V: Visitor<'de>>(self, _: usize, visitor: V) -> Res<V::Value> {
        self.r.deserialize_seq(visitor)
    }

    fn struct_variant<V: Visitor<'de>>(self, fields: &'static [&'static str], visitor: V) -> Res<V::Value> {
        self.r.deserialize_struct("", fields, visitor)
    }
}

#[cfg(test)]
mod tests {
    //! Checked against serde_json itself (with `float_roundtrip`, correctly rounded): on every input, the fast
    //! reader either gives up or reads exactly serde_json's value, and it never reads what serde_json refuses.
    use super::from_slice;
    use rand::{Rng, SeedableRng};
    use serde_json::Value;

    /// The two readers agree on `text` as a `Value` (numbers compared by kind and bits); `Some(accepted)`.
    fn agree(text: &str) -> Option<bool> {
        let ours = from_slice::<Value>(text.as_bytes());
        let theirs = serde_json::from_str::<Value>(text);
        match (ours, theirs) {
            (Some(a), Ok(b)) => {
                assert!(same(&a, &b), "{text:?}: read {a:?}, serde_json {b:?}");
                Some(true)
            }
            (Some(a), Err(e)) => panic!("{text:?}: read {a:?}, serde_json refuses it ({e})"),
            (None, Ok(_)) => Some(false),
            (None, Err(_)) => None,
        }
    }

    fn same(a: &Value, b: &Value) -> bool {
        match (a, b) {
            (Value::Number(x), Value::Number(y)) => {
                x.as_u64() == y.as_u64()
                    && x.as_i64() == y.as_i64()
                    && x.is_f64() == y.is_f64()
                    && x.as_f64().map(f64::to_bits) == y.as_f64().map(f64::to_bits)
            }
            (Value::Array(x), Value::Array(y)) => x.len() == y.len() && x.iter().zip(y).all(|(a, b)| same(a, b)),
            (Value::Object(x), Value::Object(y)) => {
                x.len() == y.len() && x.iter().zip(y).all(|((k, a), (l, b))| k == l && same(a, b))
            }
            _ => a == b,
        }
    }

    /// Every finite number serde_json reads, the fast reader reads too, to the same bits: as a `Value` (the
    /// integer kinds) and as an `f64` (the requests' probabilities).
    fn number(text: &str) {
        let theirs = serde_json::from_str::<f64>(text);
        let ours = from_slice::<f64>(text.as_bytes());
        match theirs {
            Ok(x) => assert_eq!(ours.map(f64::to_bits), Some(x.to_bits()), "{text}: serde_json reads {x:e}"),
            Err(_) => assert!(ours.is_none(), "{text}: serde_json refuses it, read {ours:?}"),
        }
        if serde_json::from_str::<Value>(text).is_ok() {
            assert_eq!(agree(text), Some(true), "{text}");
        }
    }

    #[test]
    fn numbers_of_every_form_read_to_serde_jsons_bits() {
        let fixed = [
            "0",
            "-0",
            "0.0",
            "-0.0",
            "1",
            "-1",
            "9007199254740992",
            "9007199254740993",
            "18446744073709551615",
            "18446744073709551616",
            "-9223372036854775808",
            "-9223372036854775809",
            "12345678901234567890123",
            "-12345678901234567890123",
            "1e22",
            "1e23",
            "1.7976931348623157e308",
            "1.7976931348623159e308",
            "4.9e-324",
            "2.4703282292062327e-324",
            "2.4703282292062328e-324",
            "1e-400",
            "-1e-400",
            "1e400",
            "0.1",
            "0.30000000000000004",
            "1E5",
            "1e+5",
            "1e-5",
            "0e0",
            "123.456e-2",
            "1e1000000000000",
            "1e-1000000000000",
            "0.0000000000000000000000000000001",
            "2.2250738585072011e-308",
            "2.2250738585072014e-308",
            "9007199254740993.0",
            "0.1000000000000000055511151231257827",
        ];
        for t in fixed {
            number(t);
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(13);
        let mut forms = 0;
        while forms < 60_000 {
            let x = f64::from_bits(rng.gen());
            if !x.is_finite() {
                continue;
            }
            let p: f64 = rng.gen::<f64>() * 0.2;
            for t in [format!("{x:?}"), format!("{x:e}"), format!("{:.16e}", x), format!("{p:?}"), format!("{p:.20}")] {
                number(&t);
                forms += 1;
            }
            // Digit strings of any length with a point and an exponent anywhere (beyond 19 digits, and near
            // halfway cases, the standard parser decides).
            let n = rng.gen_range(1..40);
            let mut t: String = (0..n).map(|i| char::from(b'0' + rng.gen_range(u8::from(i == 0)..10))).collect();
            if rng.gen_bool(0.5) {
                t.insert(rng.gen_range(1..=t.len()), '.');
                if t.ends_with('.') {
                    t.push('5');
                }
            }
            if rng.gen_bool(0.5) {
                t.push_str(&format!("e{}", rng.gen_range(-340..320)));
            }
            if rng.gen_bool(0.3) {
                t.insert(0, '-');
            }
            number(&t);
            forms += 1;
        }
    }

    /// `POW5` against its definition, in exact integers (num-bigint).
    #[test]
    fn the_table_of_powers_of_five() {
        use num_bigint::BigUint;
        for (i, &(hi, lo)) in super::POW5.iter().enumerate() {
            let q = super::EL_MIN + i as i64;
            let five = BigUint::from(5u32).pow(q.unsigned_abs() as u32);
            let v = if q >= 0 {
                let shift = 128 - five.bits();
                five << shift
            } else {
                (BigUint::from(1u32) << (five.bits() + 127)) / &five + 1u32
            };
            assert_eq!(v, (BigUint::from(hi) << 64) + BigUint::from(lo), "5^{q}");
        }
    }

    /// Where `eisel_lemire` decides: 19-digit significands at every exponent it takes, and numbers exactly
    /// halfway between two doubles (an odd 54-bit integer times a power of two, which has to round to even).
    #[test]
    fn full_significands_and_halfway_cases() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(19);
        for _ in 0..40_000 {
            let w: u64 = rng.gen_range(1_000_000_000_000_000_000..10_000_000_000_000_000_000);
            let q = rng.gen_range(super::EL_MIN - 19..=super::EL_MAX);
            number(&format!("{w}e{q}"));
            number(&format!("0.{w}"));
            let half = (rng.gen_range(1u64 << 53..1 << 54) | 1) << rng.gen_range(0..5);
            number(&format!("{half}e0"));
            number(&format!("{half}.0"));
            number(&format!("{}.{}e1", half / 10, half % 10));
        }
    }

    #[test]
    fn short_flat_lists_are_counted() {
        let len = |t: &str| super::Reader { input: t.as_bytes(), pos: 1, depth: 1 }.flat_len();
        assert_eq!(len("[1, 2.5,-3]"), Some(3));
        assert_eq!(len("[ \n]"), Some(0));
        assert_eq!(len("[7]"), Some(1));
        assert_eq!(len("[[1], 2]"), None);
        assert_eq!(len("[1, {\"a\": 2}]"), None);
        assert_eq!(len("[\"a,b\"]"), None);
        assert_eq!(len(&format!("[{}1]", "1,".repeat(40_000))), None, "beyond 64 kB: not counted");
        assert_eq!(from_slice::<Vec<f64>>(b"[0.5, 1e-3]").map(|v| v.capacity()), Some(2));
    }

    #[test]
    fn eight_digits_at_a_time() {
        assert_eq!(super::eight_digits(b"12345678", 0), Some(12_345_678));
        assert_eq!(super::eight_digits(b"x00000009", 1), Some(9));
        assert_eq!(super::eight_digits(b"99999999", 0), Some(99_999_999));
        for bad in [&b"1234567"[..], b"1234567a", b"/1234567", b"12345:78", b"1234 678"] {
            assert_eq!(super::eight_digits(bad, 0), None, "{bad:?}");
        }
    }

    #[test]
    fn what_serde_json_refuses_is_refused() {
        let deep_ok = format!("{}{}", "[".repeat(127), "]".repeat(127));
        let deep_bad = format!("{}{}", "[".repeat(128), "]".repeat(128));
        assert_eq!(agree(&deep_ok), Some(true));
        assert_eq!(agree(&deep_bad), None);
        let bad = [
            "",
            " ",
            "[1,]",
            "[,1]",
            "{\"a\":1,}",
            "{,}",
            "01",
            "-01",
            "1.",
            ".5",
            "-",
            "+1",
            "1e",
            "1e+",
            "1.e5",
            "[1 2]",
            "{\"a\" 1}",
            "{\"a\":}",
            "{1:2}",
            "nul",
            "tru",
            "falsy",
            "[",
            "]",
            "{",
            "1 2",
            "\"\\x\"",
            "\"\\u12\"",
            "\"\\ud800\"",
            "\"\\udc00\"",
            "\"\\ud800\\u0041\"",
            "\"a\nb\"",
            "\"\u{1}\"",
            "[1]x",
            "NaN",
            "Infinity",
            "-Infinity",
            "[1e400]",
            "{\"a\":1 \"b\":2}",
            "'a'",
            "\"abc",
            "[\"a\",]",
        ];
        for t in bad {
            assert_eq!(agree(t), None, "{t:?}");
        }
        assert!(from_slice::<Value>(b"\"\xff\"").is_none() && serde_json::from_slice::<Value>(b"\"\xff\"").is_err());
        let good = [
            "null",
            "true",
            "false",
            " [ ] ",
            "{}",
            "{\"a\":[1,2.5,-3,{\"b\":null}]}",
            "\"\\\"\\\\\\/\\b\\f\\n\\r\\t\"",
            "\"\\u00e9\\ud83d\\ude00\\u0000\"",
            "\"caf\u{e9} \u{1f600}\"",
            "\r\n\t[1]\r\n\t",
            "[-0, 0, -1, 1]",
        ];
        for t in good {
            assert_eq!(agree(t), Some(true), "{t:?}");
        }
    }

    /// Every documented example request, and each with one byte changed thousands of ways, read into its own
    /// type: the same value as serde_json's (compared by `Debug`, which writes every double's shortest
    /// round-trip form), or given up where serde_json refuses it.
    #[test]
    fn example_requests_and_their_mutations() {
        use crate::analytics::{
            chart::ChartRequest, contributions::ContributionsRequest, distribution::DistributionRequest,
            layers::LayersRequest, quantiles::QuantilesRequest, reverse_stress::ReverseStressRequest,
            tail::TailRequest,
        };
        fn check<T: serde::de::DeserializeOwned + std::fmt::Debug>(text: &[u8]) -> bool {
            let ours = from_slice::<T>(text);
            match serde_json::from_slice::<T>(text) {
                Ok(theirs) => {
                    if let Some(ours) = ours {
                        assert_eq!(format!("{ours:?}"), format!("{theirs:?}"), "{}", String::from_utf8_lossy(text));
                    }
                    true
                }
                Err(_) => {
                    assert!(ours.is_none(), "refused by serde_json, read: {}", String::from_utf8_lossy(text));
                    false
                }
            }
        }
        let examples: Value = serde_json::from_str(include_str!("../../openapi/examples/requests.json")).unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let alphabet = b" ,:[]{}\"\\-+.eE0123456789antrufl";
        let mut read = 0;
        for (kind, body) in examples.as_object().unwrap() {
            let check: fn(&[u8]) -> bool = match kind.as_str() {
                "tail" => check::<TailRequest>,
                "quantiles" => check::<QuantilesRequest>,
                "distribution" => check::<DistributionRequest>,
                "layers" => check::<LayersRequest>,
                "contributions" => check::<ContributionsRequest>,
                "chart" => check::<ChartRequest>,
                "reverse_stress" => check::<ReverseStressRequest>,
                _ => continue,
            };
            let text = serde_json::to_vec(body).unwrap();
            assert!(check(&text) && from_slice::<Value>(&text).is_some(), "{kind}");
            for _ in 0..3000 {
                let mut t = text.clone();
                let at = rng.gen_range(0..t.len());
                match rng.gen_range(0..3) {
                    0 => t[at] = alphabet[rng.gen_range(0..alphabet.len())],
                    1 => {
                        t.remove(at);
                    }
                    _ => t.insert(at, alphabet[rng.gen_range(0..alphabet.len())]),
                }
                read += usize::from(check(&t));
                agree(std::str::from_utf8(&t).unwrap());
            }
        }
        assert!(read > 1000, "the mutations should leave many documents readable ({read})");
    }
}
