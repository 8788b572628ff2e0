//! `hypsogrid.v1.QuantityValues` with its packed floats encoded and decoded as one block.
//!
//! An area answer is mostly one `repeated float` (40,000 values for 200 × 200 points). The
//! code generated for it writes and reads such a field one value at a time (a capacity check
//! and a four-byte store per value); on the wire a packed `repeated float` is one
//! length-delimited run of little-endian IEEE 754 values ("Encoding", protobuf language guide:
//! packed repeated fields, `fixed32`-width floats), which on a little-endian machine is the
//! memory of the `Vec<f32>` as it is. This type is the generated one field for field (the
//! build maps the message here), with a `prost::Message` implementation that copies that run
//! in one go. Everything else (field order, unknown fields, a float field sent unpacked, a
//! field repeated) goes through prost's own encoding functions, and the tests compare both
//! directions with prost's derived implementation of the same message.

use prost::bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

use crate::pb::Quantity;

/// Values of one quantity over the rows of one chunk (see `service.proto`).
#[derive(Clone, PartialEq, Debug, Default)]
pub struct QuantityValues {
    /// The quantity, as requested.
    pub quantity: Option<Quantity>,
    /// Values, gpm, row-major over (rows of this chunk) × (longitudes of the area): north to
    /// south, and west to east within a row. NaN where missing.
    pub values: Vec<f32>,
    /// One byte per value: the OR of `PointFlag` bits.
    pub flags: Vec<u8>,
}

const QUANTITY: u32 = 1;
const VALUES: u32 = 2;
const FLAGS: u32 = 3;

impl prost::Message for QuantityValues {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        if let Some(quantity) = &self.quantity {
            encoding::message::encode(QUANTITY, quantity, buf);
        }
        if !self.values.is_empty() {
            encoding::encode_key(VALUES, WireType::LengthDelimited, buf);
            encoding::encode_varint(packed_len(&self.values), buf);
            if cfg!(target_endian = "little") {
                buf.put_slice(float_bytes(&self.values));
            } else {
                for &v in &self.values {
                    buf.put_f32_le(v);
                }
            }
        }
        if !self.flags.is_empty() {
            encoding::bytes::encode(FLAGS, &self.flags, buf);
        }
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        match tag {
            QUANTITY => encoding::message::merge(
                wire_type,
                self.quantity.get_or_insert_with(Default::default),
                buf,
                ctx,
            ),
            VALUES if wire_type == WireType::LengthDelimited => {
                let len = encoding::decode_varint(buf)?;
                let fits = usize::try_from(len)
                    .ok()
                    .filter(|&n| n <= buf.remaining() && n % 4 == 0);
                let Some(n) = fits else {
                    // Short or ragged: prost's own decoding gives its error for it.
                    let mut head = Vec::with_capacity(10);
                    encoding::encode_varint(len, &mut head);
                    let mut rest = head.as_slice().chain(buf);
                    return encoding::float::merge_repeated(
                        wire_type,
                        &mut self.values,
                        &mut rest,
                        ctx,
                    );
                };
                let start = self.values.len();
                self.values.resize(start + n / 4, 0.0);
                let tail = &mut self.values[start..];
                buf.copy_to_slice(float_bytes_mut(tail));
                if cfg!(target_endian = "big") {
                    for v in tail.iter_mut() {
                        *v = f32::from_bits(u32::from_le(v.to_bits()));
                    }
                }
                Ok(())
            }
            VALUES => encoding::float::merge_repeated(wire_type, &mut self.values, buf, ctx),
            FLAGS => encoding::bytes::merge(wire_type, &mut self.flags, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        let quantity = self
            .quantity
            .as_ref()
            .map_or(0, |q| encoding::message::encoded_len(QUANTITY, q));
        let values = if self.values.is_empty() {
            0
        } else {
            let len = packed_len(&self.values);
            encoding::key_len(VALUES) + encoding::encoded_len_varint(len) + 4 * self.values.len()
        };
        let flags = if self.flags.is_empty() {
            0
        } else {
            encoding::bytes::encoded_len(FLAGS, &self.flags)
        };
        quantity + values + flags
    }

    fn clear(&mut self) {
        self.quantity = None;
        self.values.clear();
        self.flags.clear();
    }
}

/// Bytes of a packed run of `values`.
fn packed_len(values: &[f32]) -> u64 {
    4 * values.len() as u64
}

/// The memory of `values`, little-endian floats on a little-endian machine.
fn float_bytes(values: &[f32]) -> &[u8] {
    // SAFETY: the same memory, borrowed as long as `values`; `u8` has no alignment
    // requirement and every byte of an `f32` is initialised.
    unsafe {
        std::slice::from_raw_parts(values.as_ptr().cast::<u8>(), std::mem::size_of_val(values))
    }
}

/// The memory of `values`, to copy bytes into.
fn float_bytes_mut(values: &mut [f32]) -> &mut [u8] {
    let len = std::mem::size_of_val(values);
    // SAFETY: the same memory, exclusively borrowed as long as `values`; any bytes written
    // make a valid `f32`.
    unsafe { std::slice::from_raw_parts_mut(values.as_mut_ptr().cast::<u8>(), len) }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use prost::Message;

    /// The same message with prost's derived implementation: the reference.
    #[derive(Clone, PartialEq, prost::Message)]
    struct Derived {
        #[prost(message, optional, tag = "1")]
        quantity: Option<Quantity>,
        #[prost(float, repeated, tag = "2")]
        values: Vec<f32>,
        #[prost(bytes = "vec", tag = "3")]
        flags: Vec<u8>,
    }

    /// `values` sent unpacked (one key per value), as proto3 parsers must also accept.
    #[derive(Clone, PartialEq, prost::Message)]
    struct Unpacked {
        #[prost(float, repeated, packed = "false", tag = "2")]
        values: Vec<f32>,
    }

    fn quantity(i: u8) -> Option<Quantity> {
        (i > 0).then(|| Quantity {
            kind: Some(crate::pb::quantity::Kind::GeopotentialHeight(
                crate::pb::HeightAtPressure {
                    pressure_pa: f64::from(i) * 1000.0,
                },
            )),
        })
    }

    fn bits(v: &[f32]) -> Vec<u32> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    proptest! {
        #[test]
        fn encodes_and_decodes_as_the_derived_message(
            q in 0u8..3,
            raw in prop::collection::vec(any::<u32>(), 0..300),
            flags in prop::collection::vec(any::<u8>(), 0..300),
        ) {
            let values: Vec<f32> = raw.iter().map(|&b| f32::from_bits(b)).collect();
            let ours = QuantityValues { quantity: quantity(q), values: values.clone(), flags: flags.clone() };
            let derived = Derived { quantity: quantity(q), values, flags };
            let bytes = ours.encode_to_vec();
            prop_assert_eq!(&bytes, &derived.encode_to_vec());
            prop_assert_eq!(ours.encoded_len(), derived.encoded_len());
            let back = QuantityValues::decode(bytes.as_slice()).expect("decodes");
            prop_assert_eq!(bits(&back.values), bits(&derived.values));
            prop_assert_eq!(&back.flags, &derived.flags);
            prop_assert_eq!(&back.quantity, &derived.quantity);
        }

        /// Runs of values (a field sent more than once) concatenate, packed or not, and a buffer
        /// split into many pieces decodes the same.
        #[test]
        fn repeated_and_unpacked_runs_concatenate(
            a in prop::collection::vec(any::<u32>(), 0..50),
            b in prop::collection::vec(any::<u32>(), 0..50),
            piece in 1usize..9,
        ) {
            let fa: Vec<f32> = a.iter().map(|&x| f32::from_bits(x)).collect();
            let fb: Vec<f32> = b.iter().map(|&x| f32::from_bits(x)).collect();
            let packed = |values: &[f32]| {
                Derived { quantity: None, values: values.to_vec(), flags: vec![] }.encode_to_vec()
            };
            let mut wire = packed(&fa);
            wire.extend(Unpacked { values: fb.clone() }.encode_to_vec());
            wire.extend(packed(&fa));
            let whole = QuantityValues::decode(wire.as_slice()).expect("decodes");
            let reference = Derived::decode(wire.as_slice()).expect("decodes");
            prop_assert_eq!(bits(&whole.values), bits(&reference.values));
            prop_assert_eq!(bits(&whole.values), bits(&[fa.clone(), fb, fa].concat()));
            // The same bytes in pieces of `piece` bytes (a message split over frames).
            let mut chained: Box<dyn Buf> = Box::new(&[][..]);
            for chunk in wire.chunks(piece) {
                chained = Box::new(chained.chain(chunk));
            }
            let split = QuantityValues::decode(chained).expect("decodes in pieces");
            prop_assert_eq!(bits(&split.values), bits(&whole.values));
        }
    }

    #[test]
    fn a_short_or_ragged_run_is_refused_as_the_derived_message_refuses_it() {
        // Key of field 2 length-delimited, then a length, then fewer bytes or a length that
        // is not a whole number of floats.
        for wire in [
            vec![0x12, 8, 0, 0, 128, 63],
            vec![0x12, 6, 0, 0, 128, 63, 0, 0],
        ] {
            assert!(Derived::decode(wire.as_slice()).is_err());
            assert!(QuantityValues::decode(wire.as_slice()).is_err(), "{wire:?}");
        }
    }
}
