//! The codes of the enumerated columns. Each value is the discriminant of the
//! host's type of the same name in `core/src/series.rs` (a test of the host
//! checks that they agree).

macro_rules! codes {
    ($(#[$doc:meta])* $name:ident { $($(#[$vdoc:meta])* $variant:ident = $code:literal => $text:literal,)+ }) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
        #[repr(u8)]
        pub enum $name {
            $($(#[$vdoc])* $variant = $code,)+
        }

        impl $name {
            /// Every value, in code order.
            pub const ALL: &'static [$name] = &[$($name::$variant,)+];

            /// The value of a code, if it is one.
            #[inline]
            pub const fn from_code(code: u8) -> Option<$name> {
                match code {
                    $($code => Some($name::$variant),)+
                    _ => None,
                }
            }

            /// The code that crosses the ABI.
            #[inline]
            pub const fn code(self) -> u8 {
                self as u8
            }

            /// The name written in `cleaned.parquet`.
            #[inline]
            pub const fn as_str(self) -> &'static str {
                match self {
                    $($name::$variant => $text,)+
                }
            }
        }
    };
}

codes! {
    /// Quality class of a reading (read-only for plugins).
    Quality {
        /// Usable as an observation.
        Good = 0 => "good",
        /// Usable with a larger observation variance.
        Uncertain = 1 => "uncertain",
        /// Never used as an observation.
        Bad = 2 => "bad",
    }
}

codes! {
    /// What happened to an output row.
    Status {
        /// The reading is kept as the value (value = raw).
        Ok = 0 => "ok",
        /// A row inserted in a gap by a step of the host. Plugins cannot
        /// insert rows, so they neither set nor clear this status.
        Filled = 1 => "filled",
        /// The reading was judged faulty; the value is an estimate.
        Replaced = 2 => "replaced",
        /// The reading was judged faulty; no estimate, the value is NaN (null).
        Rejected = 3 => "rejected",
    }
}

codes! {
    /// Why a reading was judged faulty or flagged. Code 255
    /// ([`crate::NO_FAULT`]) means none.
    Fault {
        Spike = 0 => "spike",
        Stuck = 1 => "stuck",
        Step = 2 => "step",
        Drift = 3 => "drift",
        Noise = 4 => "noise",
        Range = 5 => "range",
        BadQuality = 6 => "bad_quality",
    }
}

/// The code of an optional fault.
#[inline]
pub const fn fault_code(f: Option<Fault>) -> u8 {
    match f {
        Some(f) => f.code(),
        None => crate::abi::NO_FAULT,
    }
}
