//! Typed identifiers. Each prints in a fixed-width form that sorts like the
//! number, and encodes as big-endian bytes so sled scans come back in order.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

macro_rules! typed_id {
    ($(#[$doc:meta])* $name:ident, $prefix:literal) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
        #[serde(transparent)]
        pub struct $name(pub u64);

        impl $name {
            pub fn key(self) -> [u8; 8] {
                self.0.to_be_bytes()
            }

            pub fn from_key(bytes: &[u8]) -> Option<$name> {
                Some($name(u64::from_be_bytes(bytes.try_into().ok()?)))
            }

            pub fn next(self) -> $name {
                $name(self.0 + 1)
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                write!(f, concat!($prefix, "{:06}"), self.0)
            }
        }

        impl FromStr for $name {
            type Err = String;
            fn from_str(s: &str) -> Result<$name, String> {
                let digits = s.strip_prefix($prefix).unwrap_or(s);
                digits.parse::<u64>().map($name).map_err(|_| {
                    format!(concat!("{:?} is not a valid id; write it as ", $prefix, "000012 or 12"), s)
                })
            }
        }
    };
}

typed_id!(
    /// An accepted batch (one input file), numbered from 1 in order of acceptance.
    BatchId,
    "b"
);
typed_id!(
    /// A trained model version, numbered from 1.
    ModelId,
    "m"
);
typed_id!(
    /// Position of an entry in the audit log, numbered from 1.
    AuditSeq,
    "#"
);

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_print_parse_and_sort() {
        assert_eq!(BatchId(12).to_string(), "b000012");
        assert_eq!("b000012".parse::<BatchId>(), Ok(BatchId(12)));
        assert_eq!("12".parse::<ModelId>(), Ok(ModelId(12)));
        assert!("mx".parse::<ModelId>().is_err());
        assert!(BatchId(2).key() > BatchId(1).key());
        assert!(BatchId(256).key() > BatchId(255).key());
        assert_eq!(BatchId::from_key(&BatchId(7).key()), Some(BatchId(7)));
    }
}
