//! Every input parser meets random bytes and damaged valid files. It may refuse, but it never
//! panics; what it accepts obeys the rules the parser promises (finite times, non-negative
//! amounts, infusions with a positive duration, doses in time order); what it refuses is
//! blamed on the file, at lines the file has.

use cistern::InputError;
use cistern::dosing::Route;
use cistern::io::doses::parse_doses;
use cistern::io::table::Table;
use cistern::units::{Kind, parse_name, parse_value};
use proptest::prelude::*;
use proptest::sample::{Index, select};
use std::collections::BTreeSet;

const KINDS: [Kind; 7] = [
    Kind::Time,
    Kind::Amount,
    Kind::Concentration,
    Kind::Clearance,
    Kind::Volume,
    Kind::RateConstant,
    Kind::InputRate,
];

/// Valid doses files in every accepted dialect (values invented for the test): plain LF;
/// BOM, CRLF, comments, quotes, subjects, repeats, units and an ignored column; lone-CR line
/// ends; spaces around fields and blank lines.
const SEEDS: [&[u8]; 4] = [
    b"time_h,amount_mg,route,duration_h\n0,1000,infusion,1\n12,1000,infusion,1\n30,500,bolus,\n",
    b"\xef\xbb\xbf# invented\r\nsubject,time_min,amount_g,route,duration_min,every_h,count,note\r\n\
      \"a, b\",0,1,infusion,60,12,3,x\r\nb,30,0.5,oral,,,,\"say \"\"hi\"\"\"\r\n",
    b"time_d,amount_mcg,route\r0,500,bolus\r# between\r1,250,oral\r",
    b"# first\n\n time_h , amount_ug , route \n 0 , 100 , bolus \n\n# last\n",
];

/// The number of lines in `bytes`, counting LF, CRLF and lone CR as line ends.
fn lines_in(bytes: &[u8]) -> u64 {
    let ends = (0..bytes.len())
        .filter(|&i| bytes[i] == b'\n' || (bytes[i] == b'\r' && bytes.get(i + 1) != Some(&b'\n')))
        .count();
    ends as u64 + 1
}

/// Read `bytes` as a doses file, the way every command does, check the outcome, and return
/// the problems found (none when the file was accepted).
fn read_doses(bytes: &[u8]) -> Result<Vec<InputError>, TestCaseError> {
    let errors = match Table::parse("f.csv", bytes).and_then(|t| parse_doses(&t)) {
        Ok(file) => {
            for (_, doses) in &file.subjects {
                prop_assert!(!doses.is_empty());
                for d in doses {
                    prop_assert!(
                        d.time_h.is_finite() && d.amount_mg.is_finite() && d.amount_mg >= 0.0,
                        "{d:?}"
                    );
                    let infusion = d.route == Route::Infusion;
                    prop_assert!(if infusion { d.duration_h > 0.0 } else { d.duration_h == 0.0 }, "{d:?}");
                }
                prop_assert!(doses.windows(2).all(|w| w[0].time_h <= w[1].time_h));
            }
            return Ok(Vec::new());
        }
        Err(errors) => errors,
    };
    prop_assert!(!errors.is_empty());
    let lines = lines_in(bytes);
    for e in &errors {
        prop_assert!(
            matches!(&e.origin, cistern::Origin::File { path, .. } if path == "f.csv"),
            "{:?}",
            e.origin
        );
        prop_assert!(!e.message.is_empty());
        if let Some(line) = e.line() {
            prop_assert!((1..=lines).contains(&line), "line {} of {}: {}", line, lines, e);
        }
    }
    Ok(errors)
}

/// One damage done to a file; positions are taken modulo its length.
#[derive(Debug, Clone)]
enum Edit {
    /// XOR one byte with a non-zero mask.
    Flip(usize, u8),
    /// Remove up to this many bytes.
    Delete(usize, usize),
    /// Repeat the line holding this position.
    DuplicateLine(usize),
    /// Insert a byte that means something to a CSV reader (or breaks UTF-8).
    Insert(usize, u8),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<usize>(), 1..=255u8).prop_map(|(i, m)| Edit::Flip(i, m)),
        (any::<usize>(), 1..8usize).prop_map(|(i, n)| Edit::Delete(i, n)),
        any::<usize>().prop_map(Edit::DuplicateLine),
        (any::<usize>(), select(b",,,\"\"\r\n#\xef\xff 0-e".to_vec())).prop_map(|(i, b)| Edit::Insert(i, b)),
    ]
}

fn apply(bytes: &mut Vec<u8>, edit: &Edit) {
    let len = bytes.len();
    match *edit {
        Edit::Insert(i, b) => bytes.insert(i % (len + 1), b),
        _ if len == 0 => {}
        Edit::Flip(i, mask) => bytes[i % len] ^= mask,
        Edit::Delete(i, n) => {
            let at = i % len;
            bytes.drain(at..(at + n).min(len));
        }
        Edit::DuplicateLine(i) => {
            let at = i % len;
            let start = bytes[..at].iter().rposition(|&b| b == b'\n').map_or(0, |p| p + 1);
            let end = bytes[at..].iter().position(|&b| b == b'\n').map_or(len, |p| at + p + 1);
            let line = bytes[start..end].to_vec();
            bytes.splice(end..end, line);
        }
    }
}

/// Bytes a CSV reader and the number parser care about, to reach past the first refusal.
const CSV_ALPHABET: &[u8] = b"0123456789.,,,-+eE\"#\r\n\n _abdghilmnoprstu\xef\xbb\xbf\xff";

/// For each column (or pair of columns that must agree) of a doses file with every optional
/// column, values that are right and values that are wrong. Columns: subject, time_h,
/// amount_mg, route + duration_h, every_h + count.
const COLUMNS: [(&[&str], &[&str]); 5] = [
    (&["a", "b", "\"c, d\""], &[""]),
    // 1e300 h is beyond the time limits (src/limits.rs): refused since they exist.
    (&["0", "12", "1.5", "-1", "1e5"], &["x", "1e400", "NaN", "", "1e300"]),
    (&["100", "0", "1e3", " 250 "], &["-5", "inf", "1g"]),
    (
        &["bolus,", "oral,", "Oral,", "infusion,1", "infusion,0.5"],
        &["iv,", "infusion,", "bolus,1", "infusion,-1"],
    ),
    (&[",", "12,3", ",1", "6,1"], &["0,3", ",3", "12,", "12,0", "12,1000001", "12,2.5"]),
];

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    #[test]
    fn random_bytes_are_refused_or_read_never_a_panic(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        read_doses(&bytes)?;
    }

    #[test]
    fn csv_like_noise_under_a_valid_header_never_panics(
        header in select(vec!["time_h,amount_mg,route", "subject,time_min,amount_g,route,duration_h,every_h,count"]),
        body in prop::collection::vec(select(CSV_ALPHABET.to_vec()), 0..300),
    ) {
        let mut bytes = format!("{header}\n").into_bytes();
        bytes.extend(body);
        read_doses(&bytes)?;
    }

    #[test]
    fn every_wrong_row_is_blamed_at_its_line_and_no_other(
        picks in prop::collection::vec(prop::collection::vec((prop::bool::weighted(0.1), any::<Index>()), 5), 1..5),
    ) {
        let mut text = String::from("subject,time_h,amount_mg,route,duration_h,every_h,count\n");
        let mut wrong_lines = BTreeSet::new();
        for (n, row) in picks.into_iter().enumerate() {
            if row.iter().any(|(is_wrong, _)| *is_wrong) {
                wrong_lines.insert(n as u64 + 2);
            }
            let fields: Vec<&str> = COLUMNS
                .iter()
                .zip(row)
                .map(|((right, wrong), (is_wrong, i))| *i.get(if is_wrong { wrong } else { right }))
                .collect();
            text += &fields.join(",");
            text.push('\n');
        }
        // Every wrong row is reported, at its own line, and nothing else is.
        let blamed: BTreeSet<u64> = read_doses(text.as_bytes())?.iter().filter_map(|e| e.line()).collect();
        prop_assert_eq!(blamed, wrong_lines, "{}", text);
    }

    #[test]
    fn damaged_valid_files_never_panic(
        seed in select(SEEDS.to_vec()),
        edits in prop::collection::vec(edit(), 1..6),
    ) {
        let mut bytes = seed.to_vec();
        for e in &edits {
            apply(&mut bytes, e);
        }
        read_doses(&bytes)?;
    }

    #[test]
    fn unit_values_are_finite_or_refused(
        kind in select(KINDS.to_vec()),
        text in prop_oneof!["\\PC{0,12}", "[-+]?[0-9.]{0,6}([eE][-+]?[0-9]{0,4})?[ a-zA-Z/_]{0,7}"],
    ) {
        match parse_value(kind, &text) {
            Ok(v) => prop_assert!(v.is_finite(), "{} read as {}", text, v),
            Err(m) => prop_assert!(m.contains(&text), "the message does not quote '{}': {}", text, m),
        }
    }

    #[test]
    fn column_names_never_panic(name in prop_oneof!["\\PC{0,16}", "(time|amount|duration|every)(_[a-z/]{0,5})?"]) {
        let known = [("time", Kind::Time), ("amount", Kind::Amount), ("duration", Kind::Time)];
        if let Ok(Some(n)) = parse_name(&name, &known) {
            prop_assert!(n.factor.is_finite() && n.factor > 0.0);
        }
    }
}

#[test]
fn the_seeds_are_valid() {
    // The mutations start from files the reader accepts, so damage is what they test.
    for seed in SEEDS {
        let table = Table::parse("seed.csv", seed).unwrap_or_else(|e| panic!("{e:?}"));
        assert!(parse_doses(&table).is_ok(), "{}", String::from_utf8_lossy(seed));
    }
}
