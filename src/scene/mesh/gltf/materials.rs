//! glTF materials, textures and images (embedded, in buffer views, or files beside the model).

use super::*;

impl Reader<'_> {
    /// The output material for glTF material `index` (`None`: the default material), and the
    /// texture coordinate set its base colour texture reads.
    pub(super) fn material(
        &mut self,
        index: Option<usize>,
        place: &str,
    ) -> Result<(u32, Option<u32>)> {
        let root = self.root;
        let (material, uv_set) = match index {
            None => (Material::default(), None),
            Some(i) => {
                let m = root.materials.get(i).ok_or_else(|| {
                    self.err(format!(
                        "{place}: material {i} does not exist ({} materials)",
                        root.materials.len()
                    ))
                })?;
                let pbr = &m.pbr_metallic_roughness;
                let base_color = pbr.base_color_factor.0;
                if !base_color.iter().all(|v| v.is_finite()) {
                    return Err(self.err(format!("materials[{i}]: baseColorFactor is not finite")));
                }
                let (texture, uv_set) = match &pbr.base_color_texture {
                    Some(info) => (
                        Some(self.texture(info.index.value(), i)?),
                        Some(info.tex_coord),
                    ),
                    None => (None, None),
                };
                (
                    Material {
                        base_color,
                        texture,
                        double_sided: m.double_sided,
                    },
                    uv_set,
                )
            }
        };
        if let Some(&k) = self.materials.get(&index) {
            return Ok((k, uv_set));
        }
        let k = self.out.materials.len() as u32;
        self.out.materials.push(material);
        self.materials.insert(index, k);
        Ok((k, uv_set))
    }

    pub(super) fn texture(&mut self, index: usize, material: usize) -> Result<Arc<Texture>> {
        let root = self.root;
        let tex = root.textures.get(index).ok_or_else(|| {
            self.err(format!(
                "materials[{material}]: texture {index} does not exist ({} textures)",
                root.textures.len()
            ))
        })?;
        let (mut filter, mut wrap) = (TextureFilter::Bilinear, [TextureWrap::Repeat; 2]);
        if let Some(s) = tex.sampler {
            let sampler = root.samplers.get(s.value()).ok_or_else(|| {
                self.err(format!(
                    "textures[{index}]: sampler {} does not exist",
                    s.value()
                ))
            })?;
            if let Some(Checked::Valid(MagFilter::Nearest)) = sampler.mag_filter {
                filter = TextureFilter::Nearest;
            }
            let w = |m: &Checked<WrappingMode>| match m {
                Checked::Valid(WrappingMode::ClampToEdge) => TextureWrap::ClampToEdge,
                Checked::Valid(WrappingMode::MirroredRepeat) => TextureWrap::MirroredRepeat,
                _ => TextureWrap::Repeat,
            };
            wrap = [w(&sampler.wrap_s), w(&sampler.wrap_t)];
        }
        let key = (tex.source.value(), filter, wrap);
        if let Some(t) = self.textures.get(&key) {
            return Ok(t.clone());
        }
        let (width, height, rgba) = self.image(key.0)?;
        let t = Arc::new(Texture {
            width,
            height,
            rgba,
            filter,
            wrap,
        });
        self.textures.insert(key, t.clone());
        Ok(t)
    }

    /// Decodes image `index` to RGBA8.
    pub(super) fn image(&mut self, index: usize) -> Result<(u32, u32, Vec<u8>)> {
        let root = self.root;
        let place = format!("images[{index}]");
        let img = root.images.get(index).ok_or_else(|| {
            self.err(format!(
                "{place} does not exist ({} images)",
                root.images.len()
            ))
        })?;
        let bytes: Vec<u8> = match (&img.uri, img.buffer_view) {
            (Some(uri), _) => self.load_uri(uri, &place, MAX_IMAGE_FILE_BYTES, true)?,
            (None, Some(v)) => {
                let (buf, start, len) = self.view_range(v.value(), &place)?;
                self.buffers[buf].as_ref().expect("loaded by view_range")[start..start + len]
                    .to_vec()
            }
            (None, None) => {
                return Err(self.err(format!("{place} has neither a uri nor a bufferView")))
            }
        };
        use image::ImageFormat;
        let format = match img.mime_type.as_ref().map(|m| m.0.as_str()) {
            Some("image/png") => ImageFormat::Png,
            Some("image/jpeg") => ImageFormat::Jpeg,
            _ if bytes.starts_with(b"\x89PNG") => ImageFormat::Png,
            _ if bytes.starts_with(&[0xFF, 0xD8, 0xFF]) => ImageFormat::Jpeg,
            Some(other) => {
                return Err(unsupported_error(
                    self.path,
                    format!(
                        "{place}: image type '{}' (PNG and JPEG are read)",
                        shown(other)
                    ),
                ))
            }
            None => {
                return Err(unsupported_error(
                    self.path,
                    format!("{place}: the image is neither PNG nor JPEG"),
                ))
            }
        };
        let mut limits = image::Limits::default();
        limits.max_image_width = Some(16384);
        limits.max_image_height = Some(16384);
        limits.max_alloc = Some(256 << 20);
        let mut reader = image::ImageReader::with_format(std::io::Cursor::new(bytes), format);
        reader.limits(limits);
        let decoded = reader
            .decode()
            .map_err(|e| self.err(format!("{place}: cannot decode the image: {e}")))?;
        let (w, h) = (decoded.width(), decoded.height());
        if w == 0 || h == 0 {
            return Err(self.err(format!("{place}: the image is empty")));
        }
        self.decoded_bytes += 4 * u64::from(w) * u64::from(h);
        if self.decoded_bytes > MAX_DECODED_IMAGE_BYTES {
            return Err(unsupported_error(
                self.path,
                format!(
                    "{place}: the decoded images of this file exceed {} MiB",
                    MAX_DECODED_IMAGE_BYTES >> 20
                ),
            ));
        }
        Ok((w, h, decoded.to_rgba8().into_raw()))
    }
}
