//! The catalogue: an index of every field (submessage) in a GRIB2 file, built
//! without decoding a single data value.
//!
//! In: the bytes of one file. Out: one [`FieldEntry`] per field, in file order
//! (a message that repeats sections 2-7 holds several fields), plus a list of
//! [`Problem`]s for whatever could not be read. It never panics: every length
//! a file states is checked against the bytes actually there, a broken message
//! is reported and the walk resynchronises on the next `GRIB` marker.
//!
//! Layout of GRIB edition 2: WMO-No. 306, Manual on Codes, Volume I.2, FM 92
//! GRIB (sections 0-8). Offsets in this file are 0-based octets within a
//! section; the Manual counts from 1.

use std::ops::Range;
use std::sync::Arc;

use chrono::{Duration, NaiveDate, NaiveDateTime};

use super::bytes::{all_ones, i32_at, i8_at, u16_at, u32_at, u64_at, u8_at};
use super::source::Octets;

/// A fixed surface (code table 4.5) with its value in SI units as coded.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Surface {
    /// Type of fixed surface, code table 4.5 (100 isobaric, 1 ground, 107 isentropic, ...).
    pub kind: u8,
    /// Value: scaled value x 10^-scale factor; `None` when coded as missing.
    pub value: Option<f64>,
}

impl Surface {
    fn parse(b: &[u8], at: usize) -> Option<Surface> {
        let kind = u8_at(b, at)?;
        let value = if all_ones(b, at + 1, 1) || all_ones(b, at + 2, 4) {
            None
        } else {
            let scale = i8_at(b, at + 1)?;
            let scaled = i32_at(b, at + 2)? as f64;
            Some(scaled * 10f64.powi(-scale))
        };
        Some(Surface { kind, value })
    }
}

/// One field of a GRIB2 file: where it is and what it is, values not decoded.
#[derive(Debug, Clone)]
pub struct FieldEntry {
    /// Field number in the file, from 0, counting submessages (as ecCodes with multi-field support).
    pub index: usize,
    /// Byte offset of the message that holds the field.
    pub message_offset: usize,
    /// Octets of that message in the file (its stated length, or less when
    /// the file ends first).
    pub message_len: usize,
    /// Discipline, code table 0.0.
    pub discipline: u8,
    /// Originating centre, common code table C-11.
    pub centre: u16,
    /// Originating sub-centre.
    pub subcentre: u16,
    /// Reference time of the data (section 1), UTC.
    pub reference_time: NaiveDateTime,
    /// Product definition template number (table 4.0).
    pub product_template: u16,
    /// Parameter category (table 4.1).
    pub category: u8,
    /// Parameter number (table 4.2).
    pub number: u8,
    /// Type of generating process (table 4.3).
    pub process: u8,
    /// First fixed surface.
    pub level: Surface,
    /// Second fixed surface (kind 255 when absent).
    pub level2: Surface,
    /// Forecast time of the start of the product, from the reference time.
    pub lead: Duration,
    /// Valid time: reference time plus lead, or the end of the statistical period.
    pub valid_time: NaiveDateTime,
    /// Ensemble perturbation number (templates 4.1, 4.11), if any.
    pub member: Option<u8>,
    /// Grid definition template number (table 3.1).
    pub grid_template: u16,
    /// Section 3, the grid definition, as a byte range of the file.
    pub sect3: Range<usize>,
    /// Section 3's octets (shared by the fields of a message that use it).
    pub grid_definition: Arc<[u8]>,
    /// Data representation template number (table 5.0).
    pub data_template: u16,
    /// Number of data points the grid has (section 3).
    pub num_points: usize,
    /// Section 5 byte range.
    pub sect5: Range<usize>,
    /// Section 6 byte range, already resolved to the bitmap in force when the
    /// field says "previously defined bitmap" (indicator 254).
    pub sect6: Range<usize>,
    /// Bitmap indicator as coded in this field's own section 6 (table 6.0).
    pub bitmap_indicator: u8,
    /// Section 7 byte range.
    pub sect7: Range<usize>,
    /// Flag table 3.3 bit 5: u and v relative to the grid's x and y axes.
    pub winds_grid_relative: bool,
    /// Why this field cannot be used, when the catalogue already knows.
    pub unusable: Option<String>,
}

impl FieldEntry {
    /// Lead time in whole hours (rounded toward zero), as used in file names.
    pub fn lead_hours(&self) -> i64 {
        self.lead.num_hours()
    }

    /// The same field once its message, at `message_offset` in the file, has
    /// been copied to `to` in a buffer of messages: every range moves with it.
    pub fn moved(&self, to: usize) -> FieldEntry {
        let from = self.message_offset;
        let shift = |r: &Range<usize>| -> Range<usize> {
            if r.is_empty() || r.start < from {
                r.clone()
            } else {
                r.start - from + to..r.end - from + to
            }
        };
        FieldEntry {
            message_offset: to,
            sect3: shift(&self.sect3),
            sect5: shift(&self.sect5),
            sect6: shift(&self.sect6),
            sect7: shift(&self.sect7),
            ..self.clone()
        }
    }
}

/// Something the catalogue could not read, with where it was.
#[derive(Debug, Clone, PartialEq)]
pub struct Problem {
    /// Byte offset in the file.
    pub offset: usize,
    /// Field number when the problem belongs to one field.
    pub field: Option<usize>,
    /// What is wrong, in words an operator can act on.
    pub reason: String,
}

/// Index of one file.
#[derive(Debug, Clone, Default)]
pub struct Catalogue {
    /// Every field found, in file order.
    pub fields: Vec<FieldEntry>,
    /// Every problem met on the way.
    pub problems: Vec<Problem>,
    /// The last message claims more octets than the file holds: it is cut
    /// off at the end of the file (normal while the file is still written).
    pub cut_at_end: bool,
}

const SECTION0_LEN: usize = 16;

/// Largest section 1, 3, 4 or 5 read (they describe a field; only sections 2,
/// 6 and 7 grow with the data, and those are not read here).
const MAX_DESCRIPTION_SECTION: usize = 16 << 20;

/// Build the catalogue of a whole file held in memory.
pub fn catalogue(bytes: &[u8]) -> Catalogue {
    catalogue_of(bytes)
}

/// Build the catalogue of a file where it lies, reading section by section:
/// sections 0, 1, 3, 4 and 5 and the first octets of 6 and 7, never the bitmap
/// or the data. Offsets are those of the file, as [`catalogue`] of its bytes
/// would give them.
pub fn catalogue_file(file: &std::fs::File, size: u64) -> Catalogue {
    catalogue_of(&super::source::FileOctets::new(file, size))
}

/// The catalogue of any [`Octets`].
pub fn catalogue_of<O: Octets + ?Sized>(o: &O) -> Catalogue {
    let mut cat = Catalogue::default();
    if o.is_empty() {
        cat.problems.push(Problem {
            offset: 0,
            field: None,
            reason: "empty file: no GRIB2 message".into(),
        });
        return cat;
    }
    let mut pos = 0usize;
    let mut messages = 0usize;
    while let Some(start) = o.find_marker(pos) {
        match walk_message(o, start, &mut cat) {
            Ok(next) => {
                messages += 1;
                pos = next;
            }
            Err(reason) => {
                cat.problems.push(Problem {
                    offset: start,
                    field: None,
                    reason,
                });
                pos = start + 4;
            }
        }
    }
    if cat.fields.is_empty() && cat.problems.is_empty() {
        let reason = if messages == 0 {
            "no GRIB message found (no 'GRIB' marker in the file)".to_string()
        } else {
            format!("{messages} GRIB2 message(s) but no field in them (no section 7)")
        };
        cat.problems.push(Problem {
            offset: 0,
            field: None,
            reason,
        });
    }
    cat
}

/// One section read whole: where it is and its octets.
#[derive(Clone)]
struct Section {
    range: Range<usize>,
    octets: Arc<[u8]>,
}

/// Sections of the current field while walking a message; ranges are absolute.
#[derive(Default, Clone)]
struct Open {
    s1: Option<Section>,
    s3: Option<Section>,
    s4: Option<Section>,
    s5: Option<Section>,
    s6: Option<Range<usize>>,
    s6_indicator: u8,
    bitmap_in_force: Option<Range<usize>>,
}

/// Walk one message from its `GRIB` marker; returns the offset after it.
/// Complete fields are added to the catalogue even when the message is cut
/// short; the shortfall is reported as a problem.
fn walk_message<O: Octets + ?Sized>(
    o: &O,
    start: usize,
    cat: &mut Catalogue,
) -> Result<usize, String> {
    let head = o.read(start..start.saturating_add(SECTION0_LEN))?;
    let edition = u8_at(&head, 7).ok_or("message header cut short (fewer than 8 octets)")?;
    if edition != 2 {
        return Err(format!(
            "GRIB edition {edition} message: only edition 2 is read"
        ));
    }
    let discipline = u8_at(&head, 6).ok_or("message header cut short")?;
    let total = u64_at(&head, 8).ok_or("message header cut short (fewer than 16 octets)")?;
    let total = usize::try_from(total).map_err(|_| "message length does not fit in memory")?;
    if total < SECTION0_LEN + 4 {
        return Err(format!(
            "message claims a length of {total} octets, too short for GRIB2"
        ));
    }
    let available = o.len() - start;
    let truncated = total > available;
    let end = if truncated { o.len() } else { start + total };
    let first_field = cat.fields.len();
    let mut open = Open::default();
    let mut p = start + SECTION0_LEN;
    let mut finished = false;
    // Offset of a product definition (section 4) not yet followed by its data
    // (section 7): a field described but never given values.
    let mut described: Option<usize> = None;
    while p + 4 <= end {
        let h = o.read(p..(p + 6).min(end))?;
        if h.get(..4) == Some(b"7777".as_slice()) {
            finished = true;
            break;
        }
        let (Some(len), Some(num)) = (u32_at(&h, 0), u8_at(&h, 4)) else {
            break;
        };
        let len = len as usize;
        if len < 5 || len > end - p {
            cat.problems.push(Problem {
                offset: p,
                field: None,
                reason: format!(
                    "section {num} claims {len} octets but only {} remain in the message{}",
                    end.saturating_sub(p),
                    if truncated { " (file truncated)" } else { "" }
                ),
            });
            break;
        }
        let r = p..p + len;
        let whole = |r: Range<usize>| -> Result<Option<Section>, String> {
            if r.len() > MAX_DESCRIPTION_SECTION {
                return Err(format!(
                    "section {num} claims {len} octets, more than leeward reads for a description ({MAX_DESCRIPTION_SECTION})"
                ));
            }
            let octets: Arc<[u8]> = Arc::from(o.read(r.clone())?.as_ref());
            Ok(Some(Section { range: r, octets }))
        };
        match num {
            1 => open.s1 = whole(r)?,
            2 => {}
            3 => open.s3 = whole(r)?,
            4 => {
                if let Some(at) = described {
                    cat.problems.push(no_data_section(at));
                }
                open.s4 = whole(r)?;
                described = Some(p);
            }
            5 => open.s5 = whole(r)?,
            6 => {
                let ind = u8_at(&h, 5).unwrap_or(255);
                open.s6_indicator = ind;
                match ind {
                    254 => open.s6 = open.bitmap_in_force.clone(),
                    0 => {
                        open.bitmap_in_force = Some(r.clone());
                        open.s6 = Some(r);
                    }
                    _ => open.s6 = Some(r),
                }
            }
            7 => {
                described = None;
                let field_index = cat.fields.len();
                match build_field(start, discipline, &open, r, field_index) {
                    Ok(f) => cat.fields.push(f),
                    Err(reason) => {
                        // Keep the count of fields in step with the file, so that
                        // field numbers match other decoders.
                        cat.problems.push(Problem {
                            offset: p,
                            field: Some(field_index),
                            reason: reason.clone(),
                        });
                        cat.fields
                            .push(placeholder(start, discipline, field_index, reason));
                    }
                }
            }
            n => {
                cat.problems.push(Problem {
                    offset: p,
                    field: None,
                    reason: format!("unknown section number {n}: rest of message skipped"),
                });
                break;
            }
        }
        p += len;
    }
    for f in &mut cat.fields[first_field..] {
        f.message_len = end - start;
    }
    if let (Some(at), true) = (described, finished) {
        cat.problems.push(no_data_section(at));
    }
    if truncated {
        cat.cut_at_end = true;
        cat.problems.push(Problem {
            offset: start,
            field: None,
            reason: format!(
                "message claims {total} octets but the file holds only {available} from its start (truncated file)"
            ),
        });
        return Ok(o.len());
    }
    if !finished {
        cat.problems.push(Problem {
            offset: start,
            field: None,
            reason: "message does not end with '7777' where its length says".into(),
        });
    }
    Ok(start + total)
}

/// A product definition (section 4 at `at`) never followed by its data.
fn no_data_section(at: usize) -> Problem {
    Problem {
        offset: at,
        field: None,
        reason:
            "a field's product definition (section 4) has no data section 7 after it: field skipped"
                .into(),
    }
}

fn placeholder(start: usize, discipline: u8, index: usize, reason: String) -> FieldEntry {
    let epoch = NaiveDate::from_ymd_opt(1970, 1, 1)
        .and_then(|d| d.and_hms_opt(0, 0, 0))
        .unwrap_or_default();
    FieldEntry {
        index,
        message_offset: start,
        discipline,
        centre: 0,
        subcentre: 0,
        reference_time: epoch,
        product_template: u16::MAX,
        category: 255,
        number: 255,
        process: 255,
        level: Surface {
            kind: 255,
            value: None,
        },
        level2: Surface {
            kind: 255,
            value: None,
        },
        lead: Duration::zero(),
        valid_time: epoch,
        member: None,
        grid_template: u16::MAX,
        sect3: 0..0,
        grid_definition: Arc::from(&[][..]),
        data_template: u16::MAX,
        num_points: 0,
        sect5: 0..0,
        message_len: 0,
        sect6: 0..0,
        bitmap_indicator: 255,
        sect7: 0..0,
        winds_grid_relative: false,
        unusable: Some(reason),
    }
}

/// Seconds in one unit of time range, code table 4.4.
pub fn time_unit_seconds(code: u8) -> Option<i64> {
    Some(match code {
        0 => 60,
        1 => 3600,
        2 => 86_400,
        10 => 3 * 3600,
        11 => 6 * 3600,
        12 => 12 * 3600,
        13 => 1,
        _ => return None,
    })
}

fn date_time_at(b: &[u8], at: usize) -> Option<NaiveDateTime> {
    let year = u16_at(b, at)?;
    let (mo, d, h, mi, s) = (
        u8_at(b, at + 2)?,
        u8_at(b, at + 3)?,
        u8_at(b, at + 4)?,
        u8_at(b, at + 5)?,
        u8_at(b, at + 6)?,
    );
    NaiveDate::from_ymd_opt(i32::from(year), u32::from(mo), u32::from(d))?.and_hms_opt(
        u32::from(h),
        u32::from(mi),
        u32::from(s),
    )
}

fn build_field(
    start: usize,
    discipline: u8,
    open: &Open,
    s7: Range<usize>,
    index: usize,
) -> Result<FieldEntry, String> {
    let s1 = open
        .s1
        .as_ref()
        .ok_or("field has no section 1 (identification)")?;
    let s3 = open
        .s3
        .as_ref()
        .ok_or("field has no section 3 (grid definition)")?;
    let s4 = open
        .s4
        .as_ref()
        .ok_or("field has no section 4 (product definition)")?;
    let s5 = open
        .s5
        .as_ref()
        .ok_or("field has no section 5 (data representation)")?;
    let s6 = match (&open.s6, open.s6_indicator) {
        (Some(r), _) => r.clone(),
        (None, 254) => {
            return Err("bitmap indicator 254 (previously defined bitmap) but no bitmap was defined earlier in the message".into())
        }
        (None, _) => return Err("field has no section 6 (bitmap)".into()),
    };
    let sec1 = &s1.octets[..];
    let centre = u16_at(sec1, 5).ok_or("section 1 cut short")?;
    let subcentre = u16_at(sec1, 7).ok_or("section 1 cut short")?;
    let reference_time =
        date_time_at(sec1, 12).ok_or("section 1 gives an impossible reference time")?;

    let sec3 = &s3.octets[..];
    let num_points = u32_at(sec3, 6).ok_or("section 3 cut short")? as usize;
    let grid_template = u16_at(sec3, 12).ok_or("section 3 cut short")?;
    // Flag table 3.3 bit 5 (0x08): winds relative to the grid.
    let flags_at = super::grid::flags_octet(grid_template);
    let winds_grid_relative = flags_at
        .and_then(|o| u8_at(sec3, o))
        .map(|f| f & 0x08 != 0)
        .unwrap_or(false);

    let sec4 = &s4.octets[..];
    let product_template = u16_at(sec4, 7).ok_or("section 4 cut short")?;
    let sec5 = &s5.octets[..];
    let data_template = u16_at(sec5, 9).ok_or("section 5 cut short")?;
    let bitmap_indicator = open.s6_indicator;

    // Product templates that share the layout of 4.0 in octets 10-34.
    let standard_head = matches!(product_template, 0..=2 | 5..=6 | 8..=12 | 15);
    if !standard_head {
        let mut e = placeholder(start, discipline, index, String::new());
        e.centre = centre;
        e.subcentre = subcentre;
        e.reference_time = reference_time;
        e.valid_time = reference_time;
        e.product_template = product_template;
        e.grid_template = grid_template;
        e.data_template = data_template;
        e.num_points = num_points;
        e.unusable = Some(format!(
            "product definition template 4.{product_template} is not read by leeward"
        ));
        return Ok(e);
    }
    let category = u8_at(sec4, 9).ok_or("section 4 cut short")?;
    let number = u8_at(sec4, 10).ok_or("section 4 cut short")?;
    let process = u8_at(sec4, 11).ok_or("section 4 cut short")?;
    let unit = u8_at(sec4, 17).ok_or("section 4 cut short")?;
    let ftime = u32_at(sec4, 18).ok_or("section 4 cut short")?;
    let level = Surface::parse(sec4, 22).ok_or("section 4 cut short")?;
    let level2 = Surface::parse(sec4, 28).ok_or("section 4 cut short")?;
    let unit_s = time_unit_seconds(unit)
        .ok_or_else(|| format!("forecast time unit {unit} (code table 4.4) is not supported"))?;
    let lead = Duration::try_seconds(i64::from(ftime) * unit_s)
        .ok_or_else(|| format!("forecast time {ftime} (unit {unit}) is out of range"))?;
    let member = match product_template {
        1 | 11 => u8_at(sec4, 35),
        _ => None,
    };
    let end_of_period = match product_template {
        8 => date_time_at(sec4, 34),
        11 => date_time_at(sec4, 37),
        _ => None,
    };
    let valid_time = match end_of_period {
        Some(t) => t,
        None => reference_time.checked_add_signed(lead).ok_or_else(|| {
            format!("reference time plus forecast time {ftime} (unit {unit}) is out of range")
        })?,
    };
    Ok(FieldEntry {
        index,
        message_offset: start,
        discipline,
        centre,
        subcentre,
        reference_time,
        product_template,
        category,
        number,
        process,
        level,
        level2,
        lead,
        valid_time,
        member,
        grid_template,
        sect3: s3.range.clone(),
        grid_definition: s3.octets.clone(),
        data_template,
        num_points,
        sect5: s5.range.clone(),
        message_len: 0,
        sect6: s6,
        bitmap_indicator,
        sect7: s7,
        winds_grid_relative,
        unusable: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn empty_and_garbage_files_are_problems_not_panics() {
        assert_eq!(catalogue(&[]).problems.len(), 1);
        let c = catalogue(b"this is not a grib file at all");
        assert!(c.fields.is_empty());
        assert_eq!(c.problems.len(), 1);
        // A marker followed by nothing.
        let c = catalogue(b"GRIB");
        assert!(c.fields.is_empty());
        assert!(!c.problems.is_empty());
    }

    #[test]
    fn lying_length_is_reported() {
        // Section 0 claiming 1000 octets, then a section claiming more than there is.
        let mut m = b"GRIB\0\0\0\x02".to_vec();
        m.extend_from_slice(&1000u64.to_be_bytes());
        m.extend_from_slice(&500u32.to_be_bytes());
        m.push(1);
        let c = catalogue(&m);
        assert!(c.fields.is_empty());
        assert!(c.problems.iter().any(|p| p.reason.contains("truncated")));
    }

    /// A message of section 0, the given (number, body length) sections and
    /// '7777', with every length true (WMO-No. 306 GRIB2 layout).
    fn message_of(sections: &[(u8, usize)]) -> Vec<u8> {
        let mut body = Vec::new();
        for &(num, len) in sections {
            body.extend_from_slice(&((len + 5) as u32).to_be_bytes());
            body.push(num);
            body.extend(std::iter::repeat_n(0u8, len));
        }
        let total = (16 + body.len() + 4) as u64;
        let mut m = b"GRIB\0\0\0\x02".to_vec();
        m.extend_from_slice(&total.to_be_bytes());
        m.extend_from_slice(&body);
        m.extend_from_slice(b"7777");
        m
    }

    #[test]
    fn a_message_with_no_field_is_a_problem_not_silence() {
        // A well-formed message of sections 0, 1 and 7777 only: no field.
        // Found by the mutation run (bit flips that turn a section number
        // into 2, or '7777' early); before, the file read as 0 fields and
        // no problem, and `process` could not say which file was empty.
        let c = catalogue(&message_of(&[(1, 16)]));
        assert!(c.fields.is_empty());
        assert_eq!(c.problems.len(), 1, "{:?}", c.problems);
        assert!(
            c.problems[0].reason.contains("no field"),
            "{:?}",
            c.problems
        );
        // A product definition with no data section before '7777'.
        let c = catalogue(&message_of(&[(1, 16), (3, 30), (4, 29), (5, 16)]));
        assert!(c.fields.is_empty());
        assert!(
            c.problems
                .iter()
                .any(|p| p.reason.contains("no data section 7")),
            "{:?}",
            c.problems
        );
        // Two product definitions, the first never given its data: its loss is
        // said even though the message holds another field's sections.
        let c = catalogue(&message_of(&[(1, 16), (3, 30), (4, 29), (4, 29), (5, 16)]));
        let lost = c
            .problems
            .iter()
            .filter(|p| p.reason.contains("no data section 7"));
        assert_eq!(lost.count(), 2, "{:?}", c.problems);
    }

    #[test]
    fn time_units_follow_code_table_4_4() {
        // WMO code table 4.4: 1 hour, 11 six hours, 13 second.
        assert_eq!(time_unit_seconds(1), Some(3600));
        assert_eq!(time_unit_seconds(11), Some(21_600));
        assert_eq!(time_unit_seconds(13), Some(1));
        assert_eq!(time_unit_seconds(3), None);
    }
}
