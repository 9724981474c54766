//! Model names (docs/contract.md, "Models"): one enum instead of strings,
//! so that a misspelt name is a compile error inside the service and a
//! clear configuration error at its edge.

use std::fmt;

/// An attribution model of the contract.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum ModelId {
    /// Everything to the last touch.
    LastTouch,
    /// Everything to the first touch.
    FirstTouch,
    /// Equal shares.
    Linear,
    /// Exponential decay with a half-life.
    TimeDecay,
    /// Position-based: fixed endpoint weights, the middle shares the rest.
    UShaped,
    /// Shapley value of the channel-set game.
    Shapley,
    /// Markov chain removal effect.
    Markov,
}

/// A model name that is not known, or a list that cannot be used.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum ModelListError {
    /// Unknown model name.
    #[error(
        "unknown model {0:?}: expected one of last_touch, first_touch, linear, time_decay, u_shaped, shapley, markov"
    )]
    Unknown(String),
    /// A model listed twice.
    #[error("model {0:?} is listed twice")]
    Duplicate(String),
    /// No model listed.
    #[error("no model listed")]
    Empty,
}

impl ModelId {
    /// Every model, in the contract's order.
    pub const ALL: [ModelId; 7] = [
        ModelId::LastTouch,
        ModelId::FirstTouch,
        ModelId::Linear,
        ModelId::TimeDecay,
        ModelId::UShaped,
        ModelId::Shapley,
        ModelId::Markov,
    ];
    /// The rule models, in the contract's order (the default list).
    pub const RULES: [ModelId; 5] =
        [ModelId::LastTouch, ModelId::FirstTouch, ModelId::Linear, ModelId::TimeDecay, ModelId::UShaped];
    /// The data-driven models.
    pub const DATA_DRIVEN: [ModelId; 2] = [ModelId::Shapley, ModelId::Markov];

    /// The contract's name.
    pub const fn as_str(self) -> &'static str {
        match self {
            ModelId::LastTouch => "last_touch",
            ModelId::FirstTouch => "first_touch",
            ModelId::Linear => "linear",
            ModelId::TimeDecay => "time_decay",
            ModelId::UShaped => "u_shaped",
            ModelId::Shapley => "shapley",
            ModelId::Markov => "markov",
        }
    }

    /// The model of a name.
    pub fn parse(name: &str) -> Result<ModelId, ModelListError> {
        ModelId::ALL.into_iter().find(|m| m.as_str() == name).ok_or_else(|| ModelListError::Unknown(name.to_string()))
    }

    /// True for `shapley` and `markov`, which are fitted on closed paths.
    pub const fn is_data_driven(self) -> bool {
        matches!(self, ModelId::Shapley | ModelId::Markov)
    }

    /// Parses a comma-separated list (blanks around names ignored), checking
    /// names and duplicates; order is kept (it is the output order).
    pub fn parse_list(list: &str) -> Result<Vec<ModelId>, ModelListError> {
        let mut out: Vec<ModelId> = Vec::new();
        for name in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
            let m = ModelId::parse(name)?;
            if out.contains(&m) {
                return Err(ModelListError::Duplicate(name.to_string()));
            }
            out.push(m);
        }
        if out.is_empty() {
            return Err(ModelListError::Empty);
        }
        Ok(out)
    }
}

impl fmt::Display for ModelId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl std::str::FromStr for ModelId {
    type Err = ModelListError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        ModelId::parse(s)
    }
}

impl PartialEq<str> for ModelId {
    fn eq(&self, other: &str) -> bool {
        self.as_str() == other
    }
}

impl PartialEq<&str> for ModelId {
    fn eq(&self, other: &&str) -> bool {
        self.as_str() == *other
    }
}

impl serde::Serialize for ModelId {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.as_str())
    }
}

impl<'de> serde::Deserialize<'de> for ModelId {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let s = <std::borrow::Cow<'de, str>>::deserialize(d)?;
        ModelId::parse(&s).map_err(serde::de::Error::custom)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for m in ModelId::ALL {
            assert_eq!(ModelId::parse(m.as_str()), Ok(m));
            assert_eq!(serde_json::to_string(&m).unwrap(), format!("\"{m}\""));
        }
        assert_eq!(ModelId::RULES.len() + ModelId::DATA_DRIVEN.len(), ModelId::ALL.len());
        assert!(ModelId::DATA_DRIVEN.iter().all(|m| m.is_data_driven()));
        assert!(!ModelId::RULES.iter().any(|m| m.is_data_driven()));
    }

    #[test]
    fn lists() {
        assert_eq!(ModelId::parse_list(" linear, shapley ").unwrap(), vec![ModelId::Linear, ModelId::Shapley]);
        assert_eq!(ModelId::parse_list("linear,magic"), Err(ModelListError::Unknown("magic".into())));
        assert_eq!(ModelId::parse_list("linear,linear"), Err(ModelListError::Duplicate("linear".into())));
        assert_eq!(ModelId::parse_list(" , "), Err(ModelListError::Empty));
    }
}
