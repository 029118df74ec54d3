//! CSV records of an input held in memory, as the `csv` crate's reader
//! yields them (same dialect: comma, double quote, any line terminator,
//! rows of any length), with one parser per thread, reused.
//!
//! Building a parser costs about 30 µs, more than parsing a short row, and
//! `csv::Reader` builds one for every input. A prediction request is a
//! short input, so the endpoint would spend most of its time building
//! parsers. Here each thread keeps its parser when an input is done and
//! resets it for the next one (a copy is no use: the parser's `Clone`
//! leaves most of its tables behind).

use std::cell::RefCell;

use csv_core::ReadRecordResult;

thread_local! {
    /// This thread's parser between two inputs.
    static SPARE: RefCell<Option<csv_core::Reader>> = const { RefCell::new(None) };
}

/// A parser in its starting state: this thread's spare, reset, or a new one
/// with the `csv` crate's defaults.
fn parser() -> csv_core::Reader {
    match SPARE.with(|s| s.borrow_mut().take()) {
        Some(mut p) => {
            p.reset();
            p
        }
        None => csv_core::ReaderBuilder::new().build(),
    }
}

/// The records of `bytes`, one at a time.
pub struct Records<'a> {
    /// Always `Some` until dropped, when it goes back to the thread.
    parser: Option<csv_core::Reader>,
    bytes: &'a [u8],
    /// Bytes consumed so far.
    at: usize,
    line: u64,
    done: bool,
    fields: Vec<u8>,
    ends: Vec<usize>,
}

impl Drop for Records<'_> {
    fn drop(&mut self) {
        let parser = self.parser.take();
        SPARE.with(|s| *s.borrow_mut() = parser);
    }
}

impl<'a> Records<'a> {
    pub fn new(bytes: &'a [u8]) -> Records<'a> {
        Records {
            parser: Some(parser()),
            bytes,
            at: 0,
            line: 1,
            done: false,
            fields: vec![0; 1024],
            ends: vec![0; 64],
        }
    }

    /// Reads the next record into `rec` (its position's byte is where the
    /// parser started on it, as with `csv::Reader`); false at the end.
    pub fn read(&mut self, rec: &mut csv::ByteRecord) -> bool {
        rec.clear();
        let mut position = csv::Position::new();
        position.set_byte(self.at as u64).set_line(self.line);
        rec.set_position(Some(position));
        if self.done {
            return false;
        }
        let Some(parser) = self.parser.as_mut() else {
            return false;
        };
        let (mut out, mut end) = (0, 0);
        loop {
            // An empty input tells the parser the data has ended.
            let (result, read, wrote, ended) = parser.read_record(
                &self.bytes[self.at..],
                &mut self.fields[out..],
                &mut self.ends[end..],
            );
            self.at += read;
            self.line = parser.line();
            out += wrote;
            end += ended;
            match result {
                ReadRecordResult::InputEmpty => {}
                ReadRecordResult::OutputFull => {
                    let n = self.fields.len() * 2;
                    self.fields.resize(n, 0);
                }
                ReadRecordResult::OutputEndsFull => {
                    let n = self.ends.len() * 2;
                    self.ends.resize(n, 0);
                }
                ReadRecordResult::Record => {
                    // Field ends count from the record's first output byte.
                    let mut start = 0;
                    for &e in &self.ends[..end] {
                        rec.push_field(&self.fields[start..e]);
                        start = e;
                    }
                    return true;
                }
                ReadRecordResult::End => {
                    self.done = true;
                    return false;
                }
            }
        }
    }

    /// Bytes consumed so far: after a record, where the next one starts.
    pub fn consumed(&self) -> usize {
        self.at
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Every record of `bytes` with its position's byte, by the `csv` crate.
    fn by_csv(bytes: &[u8]) -> Vec<(Vec<Vec<u8>>, u64)> {
        let mut reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(bytes);
        let mut rec = csv::ByteRecord::new();
        let mut all = Vec::new();
        while reader
            .read_byte_record(&mut rec)
            .expect("a slice cannot fail")
        {
            let byte = rec.position().expect("a position").byte();
            all.push((rec.iter().map(<[u8]>::to_vec).collect(), byte));
        }
        all
    }

    fn by_records(bytes: &[u8]) -> Vec<(Vec<Vec<u8>>, u64)> {
        let mut records = Records::new(bytes);
        let mut rec = csv::ByteRecord::new();
        let mut all = Vec::new();
        while records.read(&mut rec) {
            let byte = rec.position().expect("a position").byte();
            all.push((rec.iter().map(<[u8]>::to_vec).collect(), byte));
        }
        assert_eq!(records.consumed(), bytes.len(), "the whole input is read");
        all
    }

    #[test]
    fn the_same_records_as_the_csv_crate_on_awkward_inputs() {
        let long = "x".repeat(5000);
        let wide = vec!["7"; 300].join(",");
        let cases = [
            String::new(),
            "a,b\n1,2\n".into(),
            "a,b\r\n1,2\r\n\r\n3,4".into(),
            "a,\"b,c\"\n\"x\"\"y\",\"line\nbreak\"\n".into(),
            "\n\n,\n,,\n \n".into(),
            format!("h\n{long},{long}\n{wide}\n"),
            "\"never closed,1\n2,3\n".into(),
        ];
        for case in cases {
            assert_eq!(
                by_records(case.as_bytes()),
                by_csv(case.as_bytes()),
                "{case:?}"
            );
        }
    }

    proptest! {
        #[test]
        fn the_same_records_as_the_csv_crate(
            parts in prop::collection::vec(
                prop_oneof![
                    Just(",".to_string()),
                    Just("\"".to_string()),
                    Just("\n".to_string()),
                    Just("\r".to_string()),
                    Just("\r\n".to_string()),
                    "[a-z0-9 ]{0,12}",
                    "[a-z]{200,1500}",
                ],
                0..120,
            )
        ) {
            let text = parts.concat();
            prop_assert_eq!(by_records(text.as_bytes()), by_csv(text.as_bytes()));
        }
    }
}
