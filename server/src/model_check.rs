//! Validation of uploaded models.
//!
//! wired to engine::net::load_onnx at merge: until then [`inspect_model`] reads just
//! enough of the ONNX protobuf (a `ModelProto` with a `graph`, the graph's first
//! non-initializer input and first output) to learn the network's input and output
//! widths. Field numbers are those of the public `onnx.proto` schema.

use tessera_worker::engine::spec::NetworkShape;

/// Check that `bytes` is an ONNX model with a graph, and return its input and output
/// widths (the last dimension of the first graph input that is not an initializer,
/// and of the first graph output). Errors say what is wrong, never panic.
pub fn inspect_model(bytes: &[u8]) -> Result<NetworkShape, String> {
    if bytes.is_empty() {
        return Err("empty model".into());
    }
    let fields = parse_message(bytes).map_err(|e| format!("not an ONNX model (protobuf): {e}"))?;
    let mut graph = None;
    let mut ir_version = None;
    for f in &fields {
        match (f.number, &f.value) {
            (1, Value::Varint(v)) => ir_version = Some(*v),
            (7, Value::Bytes(b)) => graph = Some(*b),
            _ => {}
        }
    }
    if ir_version.is_none() {
        return Err("not an ONNX model: no ir_version (field 1)".into());
    }
    let graph = graph.ok_or("not an ONNX model: no graph (field 7)")?;
    let gfields = parse_message(graph).map_err(|e| format!("graph: {e}"))?;
    let mut initializers = Vec::new();
    for f in &gfields {
        if let (5, Value::Bytes(b)) = (f.number, &f.value) {
            // TensorProto.name = 8
            let t = parse_message(b).map_err(|e| format!("graph.initializer: {e}"))?;
            if let Some(name) = string_field(&t, 8) {
                initializers.push(name);
            }
        }
    }
    let mut input = None;
    let mut output = None;
    for f in &gfields {
        match (f.number, &f.value) {
            (11, Value::Bytes(b)) if input.is_none() => {
                let (name, width) = value_info(b).map_err(|e| format!("graph.input: {e}"))?;
                if !initializers.contains(&name) {
                    input = Some((name, width));
                }
            }
            (12, Value::Bytes(b)) if output.is_none() => {
                output = Some(value_info(b).map_err(|e| format!("graph.output: {e}"))?);
            }
            _ => {}
        }
    }
    let (iname, iw) = input.ok_or("graph has no input")?;
    let (oname, ow) = output.ok_or("graph has no output")?;
    let inputs = iw.ok_or(format!("graph input '{iname}': last dimension is not a fixed size"))?;
    let outputs = ow.ok_or(format!("graph output '{oname}': last dimension is not a fixed size"))?;
    if inputs == 0 || outputs == 0 {
        return Err("graph input or output has width 0".into());
    }
    Ok(NetworkShape { inputs, outputs })
}

/// Name and last fixed dimension of a `ValueInfoProto`
/// (name=1, type=2 → TypeProto.tensor_type=1 → shape=2 → dim=1 → dim_value=1).
fn value_info(b: &[u8]) -> Result<(String, Option<usize>), String> {
    let f = parse_message(b)?;
    let name = string_field(&f, 1).unwrap_or_default();
    let last = (|| {
        let ty = parse_message(bytes_field(&f, 2)?).ok()?;
        let tensor = parse_message(bytes_field(&ty, 1)?).ok()?;
        let shape = parse_message(bytes_field(&tensor, 2)?).ok()?;
        let dims: Vec<&[u8]> = shape
            .iter()
            .filter_map(|d| match (d.number, &d.value) {
                (1, Value::Bytes(b)) => Some(*b),
                _ => None,
            })
            .collect();
        let dim = parse_message(dims.last()?).ok()?;
        dim.iter().find_map(|x| match (x.number, &x.value) {
            (1, Value::Varint(v)) if *v > 0 && *v < 1 << 32 => Some(*v as usize),
            _ => None,
        })
    })();
    Ok((name, last))
}

fn bytes_field<'a>(f: &[Field<'a>], n: u32) -> Option<&'a [u8]> {
    f.iter().find_map(|x| match (x.number, &x.value) {
        (k, Value::Bytes(b)) if k == n => Some(*b),
        _ => None,
    })
}

fn string_field(f: &[Field<'_>], n: u32) -> Option<String> {
    bytes_field(f, n).map(|b| String::from_utf8_lossy(b).into_owned())
}

enum Value<'a> {
    Varint(u64),
    Bytes(&'a [u8]),
    Fixed,
}

struct Field<'a> {
    number: u32,
    value: Value<'a>,
}

fn varint(b: &[u8], pos: &mut usize) -> Result<u64, String> {
    let mut v = 0u64;
    for shift in (0..64).step_by(7) {
        let byte = *b.get(*pos).ok_or("truncated varint")?;
        *pos += 1;
        v |= ((byte & 0x7f) as u64) << shift;
        if byte & 0x80 == 0 {
            return Ok(v);
        }
    }
    Err("varint longer than 10 bytes".into())
}

/// Split a protobuf message into its top-level fields; fails unless the whole buffer
/// is a well-formed sequence of fields.
fn parse_message(b: &[u8]) -> Result<Vec<Field<'_>>, String> {
    let mut pos = 0;
    let mut out = Vec::new();
    while pos < b.len() {
        let key = varint(b, &mut pos)?;
        let number = (key >> 3) as u32;
        if number == 0 || key >> 3 > u32::MAX as u64 {
            return Err(format!("invalid field number at byte {pos}"));
        }
        let value = match key & 7 {
            0 => Value::Varint(varint(b, &mut pos)?),
            1 => {
                pos = pos.checked_add(8).filter(|&p| p <= b.len()).ok_or("truncated fixed64")?;
                Value::Fixed
            }
            2 => {
                let len = varint(b, &mut pos)? as usize;
                let end = pos.checked_add(len).filter(|&e| e <= b.len()).ok_or("length past the end")?;
                let v = &b[pos..end];
                pos = end;
                Value::Bytes(v)
            }
            5 => {
                pos = pos.checked_add(4).filter(|&p| p <= b.len()).ok_or("truncated fixed32")?;
                Value::Fixed
            }
            w => return Err(format!("unsupported wire type {w} at byte {pos}")),
        };
        out.push(Field { number, value });
    }
    Ok(out)
}

/// Protobuf encoding helpers for building small test models (public for the
/// integration tests and the benchmark; not part of the validation path).
pub mod testing {
    fn varint(mut v: u64, out: &mut Vec<u8>) {
        while v >= 0x80 {
            out.push((v as u8) | 0x80);
            v >>= 7;
        }
        out.push(v as u8);
    }
    fn len_field(n: u32, body: &[u8], out: &mut Vec<u8>) {
        varint(((n as u64) << 3) | 2, out);
        varint(body.len() as u64, out);
        out.extend_from_slice(body);
    }
    fn varint_field(n: u32, v: u64, out: &mut Vec<u8>) {
        varint((n as u64) << 3, out);
        varint(v, out);
    }
    fn value_info(name: &str, dims: &[u64]) -> Vec<u8> {
        let mut shape = Vec::new();
        for &d in dims {
            let mut dim = Vec::new();
            varint_field(1, d, &mut dim);
            len_field(1, &dim, &mut shape);
        }
        let mut tensor = Vec::new();
        varint_field(1, 1, &mut tensor); // elem_type FLOAT
        len_field(2, &shape, &mut tensor);
        let mut ty = Vec::new();
        len_field(1, &tensor, &mut ty);
        let mut vi = Vec::new();
        len_field(1, name.as_bytes(), &mut vi);
        len_field(2, &ty, &mut vi);
        vi
    }
    /// A structurally valid ONNX `ModelProto` with a graph of one input `[1, inputs]`
    /// and one output `[1, outputs]` (no nodes). `tag` goes into the doc string so
    /// that different tags give different hashes.
    pub fn tiny_model(inputs: u64, outputs: u64, tag: &str) -> Vec<u8> {
        let mut graph = Vec::new();
        len_field(2, b"g", &mut graph);
        len_field(11, &value_info("x", &[1, inputs]), &mut graph);
        len_field(12, &value_info("y", &[1, outputs]), &mut graph);
        let mut m = Vec::new();
        varint_field(1, 8, &mut m);
        len_field(6, tag.as_bytes(), &mut m);
        len_field(7, &graph, &mut m);
        m
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rejects_empty_and_garbage() {
        assert!(inspect_model(b"").unwrap_err().contains("empty"));
        assert!(inspect_model(b"{\"not\": \"onnx\"}").is_err());
        assert!(inspect_model(&[0xff; 32]).is_err());
        // A valid protobuf without a graph.
        assert!(inspect_model(&[0x08, 0x07]).unwrap_err().contains("graph"));
    }

    #[test]
    fn reads_widths_of_a_tiny_model() {
        let m = testing::tiny_model(3, 5, "t");
        assert_eq!(inspect_model(&m).unwrap(), NetworkShape { inputs: 3, outputs: 5 });
        // Truncation anywhere is caught.
        for cut in [1, m.len() / 2, m.len() - 1] {
            assert!(inspect_model(&m[..cut]).is_err(), "cut at {cut}");
        }
    }
}
