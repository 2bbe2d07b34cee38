//! `Json<T>`: the JSON answer of the computing routes, written straight into the response's body buffer.
//!
//! axum's own `Json` starts its buffer at 128 bytes, so a typical answer of 1.5 to 3 kB is copied through
//! five reallocations on its way out; this one starts at `START`, which holds a small question's answer at
//! once (larger ones grow by doubling as before). The bytes written are serde_json's, unchanged.

use super::problem::Problem;
use axum::body::Body;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use bytes::{BufMut, BytesMut};
use serde::Serialize;

/// First capacity of an answer's buffer: a tail answer at a few thresholds, with the assumptions.
pub const START: usize = 4096;

pub struct Json<T>(pub T);

impl<T: Serialize> IntoResponse for Json<T> {
    fn into_response(self) -> Response {
        let mut buf = BytesMut::with_capacity(START).writer();
        match serde_json::to_writer(&mut buf, &self.0) {
            Ok(()) => {
                let mut res = Response::new(Body::from(buf.into_inner().freeze()));
                res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("application/json"));
                res
            }
            Err(e) => Problem::internal(format!("could not write the answer: {e}")).into_response(),
        }
    }
}
