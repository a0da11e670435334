//! glTF binary data: buffers (GLB chunk, data URIs, files), buffer views and accessors read
//! into numbers, with every range checked.

use super::*;

impl Reader<'_> {
    /// Reads the bytes of a `data:` URI or of a regular file relative to the glTF file: at
    /// most `limit` bytes of it; a longer file is an error when `longer_is_error`, else cut.
    pub(super) fn load_uri(
        &self,
        uri: &str,
        place: &str,
        limit: u64,
        longer_is_error: bool,
    ) -> Result<Vec<u8>> {
        if let Some(rest) = uri.strip_prefix("data:") {
            let Some((_, payload)) = rest.split_once(";base64,") else {
                return Err(unsupported_error(
                    self.path,
                    format!("{place}: data URI without base64 encoding"),
                ));
            };
            return decode_base64(payload)
                .ok_or_else(|| self.err(format!("{place}: the data URI is not valid base64")));
        }
        let scheme_end = uri.find(':');
        let slash = uri.find('/');
        if let Some(c) = scheme_end {
            // A colon before any slash is a URI scheme (http:, file:...); not read.
            if slash.is_none_or(|s| c < s) {
                return Err(unsupported_error(
                    self.path,
                    format!(
                        "{place}: URI '{}' (only data: URIs and relative file paths are read)",
                        shown(uri)
                    ),
                ));
            }
        }
        let decoded = percent_decode(uri)
            .ok_or_else(|| self.err(format!("{place}: URI '{}' has a bad %-escape", shown(uri))))?;
        let file = self.base.join(decoded);
        let fail = |what: String| {
            Error::input(
                self.path,
                one_line(&format!(
                    "{place}: cannot read '{}': {what}",
                    file.display()
                )),
            )
        };
        let f = std::fs::File::open(&file).map_err(|e| fail(e.to_string()))?;
        let meta = f.metadata().map_err(|e| fail(e.to_string()))?;
        if !meta.is_file() {
            return Err(fail("not a regular file".into()));
        }
        if longer_is_error && meta.len() > limit {
            return Err(fail(format!("larger than {} MiB", limit >> 20)));
        }
        let mut data = Vec::new();
        std::io::Read::read_to_end(&mut std::io::Read::take(f, limit), &mut data)
            .map_err(|e| fail(e.to_string()))?;
        Ok(data)
    }

    /// Loads buffer `i` (once) and returns nothing; afterwards `self.buffers[i]` holds it.
    pub(super) fn load_buffer(&mut self, i: usize, place: &str) -> Result<()> {
        if self.buffers.get(i).is_some_and(Option::is_some) {
            return Ok(());
        }
        let root = self.root;
        let buffer = root.buffers.get(i).ok_or_else(|| {
            self.err(format!(
                "{place} refers to buffer {i}, which does not exist ({} buffers)",
                root.buffers.len()
            ))
        })?;
        let bplace = format!("buffers[{i}]");
        let mut data = match &buffer.uri {
            Some(uri) => self.load_uri(uri, &bplace, buffer.byte_length.0, false)?,
            None => self
                .bin
                .ok_or_else(|| {
                    self.err(format!("{bplace} has no uri and the file has no BIN chunk"))
                })?
                .to_vec(),
        };
        let len = buffer.byte_length.0;
        if (data.len() as u64) < len {
            return Err(self.err(format!(
                "{bplace}: byteLength is {len} but only {} bytes are there (truncated?)",
                data.len()
            )));
        }
        data.truncate(len as usize);
        self.buffers[i] = Some(data);
        Ok(())
    }

    /// Buffer index, start and length of buffer view `v`, after checking that it lies inside
    /// its buffer (which is loaded).
    pub(super) fn view_range(&mut self, v: usize, place: &str) -> Result<(usize, usize, usize)> {
        let root = self.root;
        let view = root.buffer_views.get(v).ok_or_else(|| {
            self.err(format!(
                "{place} refers to bufferView {v}, which does not exist ({} views)",
                root.buffer_views.len()
            ))
        })?;
        let b = view.buffer.value();
        self.load_buffer(b, &format!("bufferViews[{v}]"))?;
        let buf_len = self.buffers[b].as_ref().expect("loaded").len() as u64;
        let start = view.byte_offset.map(|o| o.0).unwrap_or(0);
        let len = view.byte_length.0;
        if start.checked_add(len).is_none_or(|end| end > buf_len) {
            return Err(self.err(format!(
                "bufferViews[{v}]: bytes {start}..{} lie outside buffer {b} ({buf_len} bytes)",
                start.saturating_add(len)
            )));
        }
        Ok((b, start as usize, len as usize))
    }

    /// Reads an accessor of one of the `types`, returning its values flattened.
    pub(super) fn read_accessor(
        &mut self,
        index: usize,
        types: &[Type],
        force_normalized: bool,
    ) -> Result<Vec<f64>> {
        Ok(self.read_accessor_any(index, types, force_normalized)?.0)
    }

    /// Reads an accessor of one of the `types`: values flattened, and the component count.
    /// Integer components are mapped to `[0, 1]` or `[-1, 1]` when the accessor is normalized
    /// or `force_normalized` is set (colours, whose integer forms are always normalized).
    pub(super) fn read_accessor_any(
        &mut self,
        index: usize,
        types: &[Type],
        force_normalized: bool,
    ) -> Result<(Vec<f64>, usize)> {
        let root = self.root;
        let place = format!("accessors[{index}]");
        let acc = root.accessors.get(index).ok_or_else(|| {
            self.err(format!(
                "accessor {index} does not exist ({} accessors)",
                root.accessors.len()
            ))
        })?;
        let ty = match &acc.type_ {
            Checked::Valid(t) if types.contains(t) => *t,
            _ => return Err(self.err(format!("{place}: type must be one of {types:?}"))),
        };
        let comps = match ty {
            Type::Scalar => 1,
            Type::Vec2 => 2,
            Type::Vec3 => 3,
            Type::Vec4 => 4,
            _ => unreachable!("matrix types are never requested"),
        };
        let ct = match &acc.component_type {
            Checked::Valid(c) => c.0,
            Checked::Invalid => return Err(self.err(format!("{place}: invalid componentType"))),
        };
        let normalize = (acc.normalized || force_normalized) && ct != ComponentType::F32;
        let count = acc.count.0;
        let elem = comps * component_size(ct);
        let mut values: Vec<f64>;
        match acc.buffer_view {
            Some(v) => {
                let (b, start, len) = self.view_range(v.value(), &place)?;
                let view = &root.buffer_views[v.value()];
                let stride = view.byte_stride.map(|s| s.0).unwrap_or(elem);
                if stride < elem {
                    return Err(self.err(format!(
                        "{place}: byteStride {stride} is smaller than an element ({elem} bytes)"
                    )));
                }
                let off = acc.byte_offset.map(|o| o.0).unwrap_or(0);
                if count > 0 {
                    let need =
                        u128::from(off) + stride as u128 * u128::from(count - 1) + elem as u128;
                    if need > len as u128 {
                        return Err(self.err(format!(
                            "{place}: {count} elements from byte {off} need {need} bytes but \
                             bufferView {} has {len}",
                            v.value()
                        )));
                    }
                }
                // Bounded by the view length checked above.
                let data = &self.buffers[b].as_ref().expect("loaded")[start..start + len];
                values = Vec::with_capacity(count as usize * comps);
                for k in 0..count as usize {
                    let o = off as usize + k * stride;
                    for c in 0..comps {
                        values.push(component(data, o + c * component_size(ct), ct, normalize));
                    }
                }
            }
            None => {
                let budget = (8 * self.input_bytes as u64).max(1 << 20);
                if count.saturating_mul(comps as u64) > budget {
                    return Err(self.err(format!(
                        "{place}: {count} elements without a bufferView is implausibly many \
                         for a file of {} bytes",
                        self.input_bytes
                    )));
                }
                values = vec![0.0; count as usize * comps];
            }
        }
        if let Some(sparse) = &acc.sparse {
            let sp = format!("{place}.sparse");
            let n = sparse.count.0;
            if n > count {
                return Err(self.err(format!(
                    "{sp}: count {n} exceeds the accessor count {count}"
                )));
            }
            let ict = match &sparse.indices.component_type {
                Checked::Valid(c) => c.0,
                Checked::Invalid => {
                    return Err(self.err(format!("{sp}.indices: invalid componentType")))
                }
            };
            if !matches!(
                ict,
                ComponentType::U8 | ComponentType::U16 | ComponentType::U32
            ) {
                return Err(self.err(format!("{sp}.indices: componentType must be unsigned")));
            }
            let (ib, istart, ilen) = self.view_range(sparse.indices.buffer_view.value(), &sp)?;
            let (vb, vstart, vlen) = self.view_range(sparse.values.buffer_view.value(), &sp)?;
            let ioff = sparse.indices.byte_offset.0;
            let voff = sparse.values.byte_offset.0;
            let isz = component_size(ict) as u128;
            if u128::from(ioff) + isz * u128::from(n) > ilen as u128
                || u128::from(voff) + elem as u128 * u128::from(n) > vlen as u128
            {
                return Err(self.err(format!("{sp}: indices or values run past their bufferView")));
            }
            let idata = &self.buffers[ib].as_ref().expect("loaded")[istart..istart + ilen];
            let vdata = &self.buffers[vb].as_ref().expect("loaded")[vstart..vstart + vlen];
            for k in 0..n as usize {
                let target = component(idata, ioff as usize + k * isz as usize, ict, false);
                if target >= count as f64 {
                    return Err(self.err(format!(
                        "{sp}: index {target} is not below the accessor count {count}"
                    )));
                }
                for c in 0..comps {
                    let o = voff as usize + k * elem + c * component_size(ct);
                    values[target as usize * comps + c] = component(vdata, o, ct, normalize);
                }
            }
        }
        Ok((values, comps))
    }

    pub(super) fn read_index_accessor(&mut self, index: usize) -> Result<Vec<u32>> {
        let root = self.root;
        if let Some(Checked::Valid(ct)) = root.accessors.get(index).map(|a| &a.component_type) {
            if !matches!(
                ct.0,
                ComponentType::U8 | ComponentType::U16 | ComponentType::U32
            ) {
                return Err(self.err(format!(
                    "accessors[{index}]: indices must be unsigned bytes, shorts or ints"
                )));
            }
        }
        let v = self.read_accessor(index, &[Type::Scalar], false)?;
        Ok(v.into_iter().map(|x| x as u32).collect())
    }
}

pub(super) fn component_size(ct: ComponentType) -> usize {
    match ct {
        ComponentType::I8 | ComponentType::U8 => 1,
        ComponentType::I16 | ComponentType::U16 => 2,
        ComponentType::U32 | ComponentType::F32 => 4,
    }
}

/// Decodes one little-endian component at `o` (in bounds, checked by the caller).
pub(super) fn component(data: &[u8], o: usize, ct: ComponentType, normalize: bool) -> f64 {
    let b = &data[o..o + component_size(ct)];
    match ct {
        ComponentType::I8 => {
            let v = f64::from(b[0] as i8);
            if normalize {
                (v / 127.0).max(-1.0)
            } else {
                v
            }
        }
        ComponentType::U8 => {
            let v = f64::from(b[0]);
            if normalize {
                v / 255.0
            } else {
                v
            }
        }
        ComponentType::I16 => {
            let v = f64::from(i16::from_le_bytes([b[0], b[1]]));
            if normalize {
                (v / 32767.0).max(-1.0)
            } else {
                v
            }
        }
        ComponentType::U16 => {
            let v = f64::from(u16::from_le_bytes([b[0], b[1]]));
            if normalize {
                v / 65535.0
            } else {
                v
            }
        }
        ComponentType::U32 => {
            let v = f64::from(u32::from_le_bytes([b[0], b[1], b[2], b[3]]));
            if normalize {
                v / 4294967295.0
            } else {
                v
            }
        }
        ComponentType::F32 => f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]])),
    }
}

/// Decodes standard or URL-safe base64, with optional `=` padding; `None` when malformed.
pub(super) fn decode_base64(text: &str) -> Option<Vec<u8>> {
    let text = text.trim_end_matches('=');
    let mut out = Vec::with_capacity(text.len() / 4 * 3 + 3);
    let (mut acc, mut bits) = (0u32, 0u32);
    for c in text.bytes() {
        let v = match c {
            b'A'..=b'Z' => c - b'A',
            b'a'..=b'z' => c - b'a' + 26,
            b'0'..=b'9' => c - b'0' + 52,
            b'+' | b'-' => 62,
            b'/' | b'_' => 63,
            _ => return None,
        };
        acc = (acc << 6) | u32::from(v);
        bits += 6;
        if bits >= 8 {
            bits -= 8;
            out.push((acc >> bits) as u8);
            acc &= (1 << bits) - 1;
        }
    }
    // A single leftover character (6 bits) cannot end valid base64.
    (bits < 6).then_some(out)
}

/// Decodes `%XX` escapes of a relative URI into a path string; `None` for a bad escape or
/// invalid UTF-8.
pub(super) fn percent_decode(uri: &str) -> Option<String> {
    let b = uri.as_bytes();
    let mut out = Vec::with_capacity(b.len());
    let mut i = 0;
    while i < b.len() {
        if b[i] == b'%' {
            let hex = std::str::from_utf8(b.get(i + 1..i + 3)?).ok()?;
            out.push(u8::from_str_radix(hex, 16).ok()?);
            i += 3;
        } else {
            out.push(b[i]);
            i += 1;
        }
    }
    String::from_utf8(out).ok()
}
