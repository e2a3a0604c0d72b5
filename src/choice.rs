//! Options with a fixed set of values (the method, the transform, the oxygen and
//! background rules): each stage lists its values here, and the command line and the
//! configuration file read them by the same names, without the stage depending on either.

use serde::de::DeserializeOwned;
use serde::Serialize;

/// An option with a fixed set of values.
pub trait Choice: Copy + Serialize + DeserializeOwned + Send + Sync + 'static {
    /// Every value, in the order help lists them.
    const ALL: &'static [Self];
    /// The value's name on the command line and in a configuration file (its serde name;
    /// a test holds them equal).
    fn name(self) -> &'static str;
    /// One line on the value, for help.
    fn help(self) -> &'static str;
}

/// The value named `name`, if there is one.
pub fn from_name<T: Choice>(name: &str) -> Option<T> {
    T::ALL.iter().copied().find(|v| v.name() == name)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// Every value's name is its serde name, and names are unique.
    pub(crate) fn names_are_serde_names<T: Choice + PartialEq + std::fmt::Debug>() {
        for &v in T::ALL {
            assert_eq!(serde_json::to_value(v).unwrap(), v.name(), "{v:?}");
            assert_eq!(from_name::<T>(v.name()), Some(v));
            assert!(!v.help().is_empty());
        }
        assert_eq!(from_name::<T>("no-such-value"), None);
    }

    #[test]
    fn every_choice_is_named_as_in_a_configuration_file() {
        names_are_serde_names::<crate::cluster::Method>();
        names_are_serde_names::<crate::prepare::Stabilise>();
        names_are_serde_names::<crate::characterise::OxygenMode>();
        names_are_serde_names::<crate::characterise::BackgroundMode>();
        names_are_serde_names::<crate::synth::Scenario>();
    }
}
