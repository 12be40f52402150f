//! Closed sets of named options (a fit method, an output format): how each option is written,
//! read back and described, so that any front end can parse and list them.

use crate::error::InputError;

/// A closed set of named options, declared with the crate's `choice_enum!` macro.
pub trait Choice: Copy + 'static {
    /// What an option of the set is, for messages (`method`).
    const WHAT: &'static str;
    /// The options that can be asked for, in the order they are listed.
    const ALL: &'static [Self];
    /// How the option is written (`two-level`).
    fn spelling(self) -> &'static str;
    /// What the option means, in one sentence.
    fn about(self) -> &'static str;
}

/// The option spelled `text`, or an error that lists the accepted spellings.
pub fn parse<C: Choice>(text: &str) -> Result<C, InputError> {
    C::ALL.iter().copied().find(|c| c.spelling() == text).ok_or_else(|| {
        let accepted: Vec<&str> = C::ALL.iter().map(|c| c.spelling()).collect();
        InputError::field(
            C::WHAT,
            format!("unknown {} '{text}'; expected one of: {}", C::WHAT, accepted.join(", ")),
        )
    })
}

/// Declares an enum as a [`Choice`], with `FromStr` and `Display` by its spellings. Each
/// variant has a one-line doc comment (its [`Choice::about`]) and a spelling; the variants
/// after a `;` are written out but cannot be asked for.
macro_rules! choice_enum {
    (
        $(#[$meta:meta])*
        $vis:vis enum $name:ident: $what:literal {
            $(#[doc = $about:literal] $variant:ident = $spelling:literal,)+
            $(; $(#[doc = $hidden_about:literal] $hidden:ident = $hidden_spelling:literal,)+)?
        }
    ) => {
        $(#[$meta])*
        $vis enum $name {
            $(#[doc = $about] $variant,)+
            $($(#[doc = $hidden_about] $hidden,)+)?
        }

        impl $crate::choice::Choice for $name {
            const WHAT: &'static str = $what;
            const ALL: &'static [Self] = &[$($name::$variant),+];
            fn spelling(self) -> &'static str {
                match self {
                    $($name::$variant => $spelling,)+
                    $($($name::$hidden => $hidden_spelling,)+)?
                }
            }
            fn about(self) -> &'static str {
                match self {
                    $($name::$variant => $about.trim(),)+
                    $($($name::$hidden => $hidden_about.trim(),)+)?
                }
            }
        }

        impl std::str::FromStr for $name {
            type Err = $crate::error::InputError;
            fn from_str(text: &str) -> Result<Self, Self::Err> {
                $crate::choice::parse(text)
            }
        }

        impl std::fmt::Display for $name {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str($crate::choice::Choice::spelling(*self))
            }
        }
    };
}
pub(crate) use choice_enum;

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::{Intervals, Method};

    #[test]
    fn spellings_read_back_and_unknown_ones_list_the_accepted() {
        for m in Method::ALL {
            assert_eq!(m.to_string().parse::<Method>(), Ok(*m));
        }
        assert_eq!(Method::TwoLevel.to_string(), "two-level");
        assert_eq!(Method::Map.about(), "Maximum a posteriori against the population model.");
        let e = "wl".parse::<Method>().unwrap_err();
        assert_eq!(e.message, "unknown method 'wl'; expected one of: map, wls, two-level");
        // Written out, but not a choice.
        assert_eq!(Intervals::LeastSquares.to_string(), "least-squares");
        assert!("least-squares".parse::<Intervals>().is_err());
    }
}
