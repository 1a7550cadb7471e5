//! The `.npy` header: a Python dict literal, parsed by hand (never evaluated).

use super::{Dtype, MAX_NDIM, MAX_NESTING, NpyError};

/// The three things a header says.
pub(super) struct Header {
    pub(super) dtype: Dtype,
    pub(super) fortran_order: bool,
    pub(super) shape: Vec<usize>,
}

/// A Python literal, as much of the grammar as `.npy` headers use.
enum Lit<'a> {
    Str(&'a [u8]),
    Bool(bool),
    /// Sign and magnitude; `None` when the magnitude passes `u64::MAX`.
    Int {
        negative: bool,
        magnitude: Option<u64>,
    },
    Tuple(Vec<Lit<'a>>),
    /// A list, dict or `None`: syntax NumPy may write (structured dtypes)
    /// whose content no supported header needs.
    Other,
}

/// One `key: value` pair of a dict, with the value's source span so an
/// unsupported dtype can be named by its text.
struct Entry<'a> {
    key: &'a [u8],
    value: Lit<'a>,
    span: (usize, usize),
}

pub(super) fn parse_header(text: &[u8]) -> Result<Header, NpyError> {
    let mut p = Parser { text, pos: 0 };
    p.skip_space();
    let entries = p.dict(0)?;
    p.skip_space();
    if p.pos != text.len() {
        return Err(p.error("the end of the header after the dict"));
    }

    let (mut descr, mut fortran, mut shape) = (None, None, None);
    for Entry { key, value, span } in entries {
        let (slot, name) = match key {
            b"descr" => (&mut descr, "descr"),
            b"fortran_order" => (&mut fortran, "fortran_order"),
            b"shape" => (&mut shape, "shape"),
            _ => {
                return Err(NpyError::UnexpectedKey {
                    key: String::from_utf8_lossy(key).into_owned(),
                });
            }
        };
        if slot.replace((value, span)).is_some() {
            return Err(NpyError::DuplicateKey { key: name });
        }
    }
    let (descr, descr_span) = descr.ok_or(NpyError::MissingKey { key: "descr" })?;
    let (fortran, _) = fortran.ok_or(NpyError::MissingKey {
        key: "fortran_order",
    })?;
    let (shape, _) = shape.ok_or(NpyError::MissingKey { key: "shape" })?;

    let dtype = match descr {
        Lit::Str(s) => Dtype::parse(s).ok_or_else(|| String::from_utf8_lossy(s).into_owned()),
        // Structured dtypes arrive as a list of field tuples; name them by
        // their source text.
        _ => Err(String::from_utf8_lossy(&text[descr_span.0..descr_span.1]).into_owned()),
    }
    .map_err(|descr| NpyError::UnsupportedDtype { descr })?;
    let Lit::Bool(fortran_order) = fortran else {
        return Err(NpyError::BadValue {
            key: "fortran_order",
            expected: "True or False",
        });
    };
    let bad_shape = NpyError::BadValue {
        key: "shape",
        expected: "a tuple of non-negative integers",
    };
    let Lit::Tuple(dims) = shape else {
        return Err(bad_shape);
    };
    if dims.len() > MAX_NDIM {
        return Err(NpyError::TooManyDims {
            ndim: dims.len(),
            max: MAX_NDIM,
        });
    }
    let mut shape = Vec::with_capacity(dims.len());
    for (axis, dim) in dims.into_iter().enumerate() {
        match dim {
            Lit::Int {
                negative: false,
                magnitude,
            }
            | Lit::Int {
                magnitude: magnitude @ Some(0),
                ..
            } => {
                let dim = magnitude.and_then(|m| usize::try_from(m).ok());
                shape.push(dim.ok_or(NpyError::DimensionTooLarge { axis })?);
            }
            _ => return Err(bad_shape),
        }
    }
    Ok(Header {
        dtype,
        fortran_order,
        shape,
    })
}

/// Recursive-descent parser over the header bytes. Only ASCII matters
/// outside string literals, so version 3.0's UTF-8 needs no decoding.
struct Parser<'a> {
    text: &'a [u8],
    pos: usize,
}

impl<'a> Parser<'a> {
    fn error(&self, expected: &'static str) -> NpyError {
        NpyError::MalformedHeader {
            offset: self.pos,
            expected,
        }
    }

    fn peek(&self) -> Option<u8> {
        self.text.get(self.pos).copied()
    }

    fn skip_space(&mut self) {
        while matches!(self.peek(), Some(b' ' | b'\t' | b'\n' | b'\r' | b'\x0c')) {
            self.pos += 1;
        }
    }

    fn expect(&mut self, byte: u8, expected: &'static str) -> Result<(), NpyError> {
        if self.peek() == Some(byte) {
            self.pos += 1;
            Ok(())
        } else {
            Err(self.error(expected))
        }
    }

    /// Parses `{key: value, ...}` with string keys; returns each value with
    /// its source span.
    fn dict(&mut self, depth: usize) -> Result<Vec<Entry<'a>>, NpyError> {
        self.expect(b'{', "'{'")?;
        let mut entries = Vec::new();
        loop {
            self.skip_space();
            if self.peek() == Some(b'}') {
                self.pos += 1;
                return Ok(entries);
            }
            let key = self.string()?;
            self.skip_space();
            self.expect(b':', "':'")?;
            self.skip_space();
            let start = self.pos;
            let value = self.value(depth + 1)?;
            entries.push(Entry {
                key,
                value,
                span: (start, self.pos),
            });
            self.skip_space();
            match self.peek() {
                Some(b',') => self.pos += 1,
                Some(b'}') => {}
                _ => return Err(self.error("',' or '}'")),
            }
        }
    }

    /// Parses the items of a tuple or list up to `close`; also reports
    /// whether a comma was seen, which tells `(5,)` from `(5)`.
    fn items(&mut self, close: u8, depth: usize) -> Result<(Vec<Lit<'a>>, bool), NpyError> {
        let mut items = Vec::new();
        let mut comma = false;
        loop {
            self.skip_space();
            if self.peek() == Some(close) {
                self.pos += 1;
                return Ok((items, comma));
            }
            items.push(self.value(depth + 1)?);
            self.skip_space();
            match self.peek() {
                Some(b',') => {
                    comma = true;
                    self.pos += 1;
                }
                Some(c) if c == close => {}
                _ => return Err(self.error("',' or a closing bracket")),
            }
        }
    }

    fn value(&mut self, depth: usize) -> Result<Lit<'a>, NpyError> {
        if depth > MAX_NESTING {
            return Err(self.error("less deeply nested brackets"));
        }
        match self.peek() {
            Some(b'\'' | b'"') => self.string().map(Lit::Str),
            Some(b'{') => self.dict(depth).map(|_| Lit::Other),
            Some(b'[') => {
                self.pos += 1;
                self.items(b']', depth).map(|_| Lit::Other)
            }
            Some(b'(') => {
                self.pos += 1;
                let (mut items, comma) = self.items(b')', depth)?;
                // `(x)` is only x in parentheses; a tuple needs a comma.
                match (items.pop(), items.is_empty() && !comma) {
                    (Some(only), true) => Ok(only),
                    (last, _) => {
                        items.extend(last);
                        Ok(Lit::Tuple(items))
                    }
                }
            }
            Some(b'-' | b'+' | b'0'..=b'9') => self.int(),
            Some(c) if c.is_ascii_alphabetic() => {
                let start = self.pos;
                while self
                    .peek()
                    .is_some_and(|c| c.is_ascii_alphanumeric() || c == b'_')
                {
                    self.pos += 1;
                }
                match &self.text[start..self.pos] {
                    b"True" => Ok(Lit::Bool(true)),
                    b"False" => Ok(Lit::Bool(false)),
                    b"None" => Ok(Lit::Other),
                    _ => {
                        self.pos = start;
                        Err(self.error("True, False or None"))
                    }
                }
            }
            _ => Err(self.error("a string, number, bool or bracket")),
        }
    }

    /// A quoted string without prefix. Backslash escapes are skipped over but
    /// not interpreted: the strings we use (dtype codes, keys) have none.
    fn string(&mut self) -> Result<&'a [u8], NpyError> {
        let quote = match self.peek() {
            Some(q @ (b'\'' | b'"')) => q,
            _ => return Err(self.error("a quoted string")),
        };
        self.pos += 1;
        let start = self.pos;
        loop {
            match self.peek() {
                Some(b'\\') => self.pos += 2,
                Some(c) if c == quote => break,
                Some(b'\n') | None => return Err(self.error("a closing quote")),
                Some(_) => self.pos += 1,
            }
        }
        let s = &self.text[start..self.pos];
        self.pos += 1;
        Ok(s)
    }

    /// A decimal integer; a trailing `L` (Python 2 long, found in old files)
    /// is accepted.
    fn int(&mut self) -> Result<Lit<'a>, NpyError> {
        let negative = self.peek() == Some(b'-');
        if matches!(self.peek(), Some(b'-' | b'+')) {
            self.pos += 1;
        }
        let start = self.pos;
        let mut magnitude = Some(0u64);
        while let Some(d @ b'0'..=b'9') = self.peek() {
            magnitude = magnitude
                .and_then(|m| m.checked_mul(10))
                .and_then(|m| m.checked_add(u64::from(d - b'0')));
            self.pos += 1;
        }
        if self.pos == start {
            return Err(self.error("a digit"));
        }
        if matches!(self.peek(), Some(b'L' | b'l')) {
            self.pos += 1;
        }
        Ok(Lit::Int {
            negative,
            magnitude,
        })
    }
}
