//! Decoding of field values through the `grib` crate's packing decoders.
//!
//! In: the bytes of a file and one catalogue entry. Out: the field's values as
//! `f32` in leeward's orientation (rows south to north), NaN at points the
//! bitmap marks missing; or a [`DecodeError`] naming the reason. The crate is
//! given owned copies of sections 5, 6 and 7 so fields decode in parallel; a
//! panic inside it is caught and reported as a decode error, never passed on.

use std::panic::{catch_unwind, AssertUnwindSafe};

use thiserror::Error;

use super::catalogue::FieldEntry;
use super::grid::Scan;

/// Why a field's values could not be had.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum DecodeError {
    /// The catalogue already found the field unusable.
    #[error("{0}")]
    Unusable(String),
    /// The packing decoder refused the data.
    #[error("data representation template 5.{template}: {reason}")]
    Packing {
        /// Template number (code table 5.0).
        template: u16,
        /// The decoder's words.
        reason: String,
    },
    /// The number of values does not match the grid.
    #[error("decoded {got} values but the grid has {want} points")]
    Count {
        /// Values decoded.
        got: usize,
        /// Points on the grid.
        want: usize,
    },
}

/// Data representation templates the decoder reads (code table 5.0).
pub const SUPPORTED_PACKINGS: [u16; 7] = [0, 2, 3, 40, 41, 42, 200];

/// Decode one field's values in file order (NaN where the bitmap says missing).
pub fn decode_raw(bytes: &[u8], f: &FieldEntry) -> Result<Vec<f32>, DecodeError> {
    if let Some(r) = &f.unusable {
        return Err(DecodeError::Unusable(r.clone()));
    }
    if !SUPPORTED_PACKINGS.contains(&f.data_template) {
        return Err(DecodeError::Packing {
            template: f.data_template,
            reason: "packing not supported".into(),
        });
    }
    let get = |r: &std::ops::Range<usize>| bytes.get(r.clone()).map(<[u8]>::to_vec);
    let (Some(s5), Some(s6), Some(s7)) = (get(&f.sect5), get(&f.sect6), get(&f.sect7)) else {
        return Err(DecodeError::Unusable("section ranges outside the file".into()));
    };
    let mut s6 = s6;
    // A field that reuses the previous bitmap (indicator 254) was pointed at that
    // bitmap's section by the catalogue; it is an ordinary bitmap section.
    if s6.len() > 5 && f.bitmap_indicator == 254 {
        s6[5] = 0;
    }
    let template = f.data_template;
    let n = f.num_points;
    let run = || -> Result<Vec<f32>, String> {
        let dec = grib::Grib2SubmessageDecoder::new(n, s5, s6, s7).map_err(|e| e.to_string())?;
        let vals = dec.dispatch().map_err(|e| e.to_string())?;
        Ok(vals.collect())
    };
    let values = match catch_unwind(AssertUnwindSafe(run)) {
        Ok(Ok(v)) => v,
        Ok(Err(reason)) => return Err(DecodeError::Packing { template, reason }),
        Err(_) => {
            return Err(DecodeError::Packing {
                template,
                reason: "the packed data are inconsistent (decoder stopped)".into(),
            })
        }
    };
    if values.len() != n {
        return Err(DecodeError::Count { got: values.len(), want: n });
    }
    Ok(values)
}

/// Decode one field and put its values in leeward's orientation.
pub fn decode(bytes: &[u8], f: &FieldEntry, scan: &Scan) -> Result<Vec<f32>, DecodeError> {
    let raw = decode_raw(bytes, f)?;
    if raw.len() != scan.ni * scan.nj {
        return Err(DecodeError::Count { got: raw.len(), want: scan.ni * scan.nj });
    }
    Ok(scan.normalise(&raw))
}
