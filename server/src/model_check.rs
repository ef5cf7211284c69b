//! Validation of uploaded models: a model is accepted only if the engine's own ONNX
//! reader accepts it, so every stored model is one a worker can load.

use tessera_engine::net;
use tessera_engine::spec::NetworkShape;

/// Read `bytes` with the engine's ONNX reader and return the network's input and
/// output widths. The error names the node or tensor at fault; never panics.
pub fn inspect_model(bytes: &[u8]) -> Result<NetworkShape, String> {
    if bytes.is_empty() {
        return Err("empty model".into());
    }
    net::load_onnx(bytes).map(|n| n.shape()).map_err(|e| e.to_string())
}

/// Small valid models for the tests and the benchmark (not part of the validation path).
pub mod testing {
    use prost::Message;
    use tessera_engine::net::proto::*;

    fn value_info(name: &str, dims: &[i64]) -> ValueInfoProto {
        ValueInfoProto {
            name: name.into(),
            r#type: Some(TypeProto {
                tensor_type: Some(TypeProtoTensor {
                    elem_type: data_type::DOUBLE,
                    shape: Some(TensorShapeProto {
                        dim: dims.iter().map(|&d| Dimension { value: Some(DimensionValue::DimValue(d)) }).collect(),
                    }),
                }),
            }),
        }
    }

    /// A valid ONNX model `y = W x + b` (one Gemm node, double weights) taking
    /// `[1, inputs]` to `[1, outputs]`. `tag` goes into the producer name so that
    /// different tags give different hashes (and a long tag a large file).
    pub fn tiny_model(inputs: u64, outputs: u64, tag: &str) -> Vec<u8> {
        let (i, o) = (inputs as i64, outputs as i64);
        let w = TensorProto {
            dims: vec![o, i],
            data_type: data_type::DOUBLE,
            name: "W".into(),
            double_data: (0..o * i).map(|k| ((k % 7) as f64 - 3.0) / 4.0).collect(),
            ..Default::default()
        };
        let b = TensorProto {
            dims: vec![o],
            data_type: data_type::DOUBLE,
            name: "B".into(),
            double_data: (0..o).map(|k| k as f64 / 8.0).collect(),
            ..Default::default()
        };
        let gemm = NodeProto {
            input: vec!["x".into(), "W".into(), "B".into()],
            output: vec!["y".into()],
            name: "gemm".into(),
            op_type: "Gemm".into(),
            attribute: vec![AttributeProto { name: "transB".into(), r#type: attribute_type::INT, i: 1, ..Default::default() }],
            ..Default::default()
        };
        let graph = GraphProto {
            node: vec![gemm],
            name: "g".into(),
            initializer: vec![w, b],
            input: vec![value_info("x", &[1, i])],
            output: vec![value_info("y", &[1, o])],
        };
        let m = ModelProto {
            ir_version: 8,
            opset_import: vec![OperatorSetIdProto { domain: String::new(), version: 13 }],
            producer_name: tag.into(),
            graph: Some(graph),
        };
        m.encode_to_vec()
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
        assert!(inspect_model(&[0x08, 0x07]).is_err());
    }

    #[test]
    fn reads_widths_of_a_tiny_model() {
        let m = testing::tiny_model(3, 5, "t");
        assert_eq!(inspect_model(&m).unwrap(), NetworkShape { inputs: 3, outputs: 5 });
        for cut in [1, m.len() / 2, m.len() - 1] {
            assert!(inspect_model(&m[..cut]).is_err(), "cut at {cut}");
        }
    }
}
