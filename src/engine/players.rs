//! Players of the attribution game: single features, or named groups of
//! features that are removed and kept together.

use super::coalition::{Coalition, MAX_PLAYERS};
use super::error::{EngineError, Result};

/// How features map to players. Players are ordered by the first appearance
/// of their feature (or group) in the feature list.
#[derive(Debug, Clone, PartialEq)]
pub struct Players {
    names: Vec<String>,
    members: Vec<Vec<usize>>,
    of_feature: Vec<usize>,
}

impl Players {
    /// One player per feature, named `x0`, `x1`, … .
    pub fn singletons(features: usize) -> Players {
        let names: Vec<String> = (0..features).map(|j| format!("x{j}")).collect();
        Players::try_new(&names, &vec![String::new(); features]).expect("singletons are valid")
    }

    /// `groups[j]` is feature `j`'s group name, or empty for a feature that
    /// is its own player (named after the feature).
    pub fn try_new(feature_names: &[String], groups: &[String]) -> Result<Players> {
        if feature_names.is_empty() {
            return Err(EngineError::new(
                "features",
                "at least one feature is required",
            ));
        }
        if groups.len() != feature_names.len() {
            return Err(EngineError::new(
                "features.group",
                format!(
                    "{} group names given for {} features",
                    groups.len(),
                    feature_names.len()
                ),
            ));
        }
        let mut names: Vec<String> = Vec::new();
        let mut members: Vec<Vec<usize>> = Vec::new();
        let mut of_feature = Vec::with_capacity(feature_names.len());
        for (j, (name, group)) in feature_names.iter().zip(groups).enumerate() {
            if name.trim().is_empty() {
                return Err(EngineError::new(
                    "features.name",
                    format!("feature {j} has an empty name"),
                ));
            }
            if feature_names[..j].contains(name) {
                return Err(EngineError::new(
                    "features.name",
                    format!("feature name {name:?} appears twice"),
                ));
            }
            let player_name = if group.is_empty() { name } else { group };
            let existing = names.iter().position(|n| n == player_name);
            let player = match existing {
                // A lone feature whose name is taken by a group (or the
                // reverse) would make two players indistinguishable.
                Some(p) if group.is_empty() || members[p].iter().any(|&f| groups[f].is_empty()) => {
                    return Err(EngineError::new(
                        "features.group",
                        format!("{player_name:?} names both a feature and a group"),
                    ));
                }
                Some(p) => p,
                None => {
                    names.push(player_name.clone());
                    members.push(Vec::new());
                    names.len() - 1
                }
            };
            members[player].push(j);
            of_feature.push(player);
        }
        if names.len() > MAX_PLAYERS {
            return Err(EngineError::new(
                "features",
                format!(
                    "{} players exceed the limit of {MAX_PLAYERS}; group features to reduce them",
                    names.len()
                ),
            ));
        }
        Ok(Players {
            names,
            members,
            of_feature,
        })
    }

    pub fn len(&self) -> usize {
        self.names.len()
    }

    pub fn is_empty(&self) -> bool {
        self.names.is_empty()
    }

    pub fn features(&self) -> usize {
        self.of_feature.len()
    }

    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Feature indices of `player`, in feature order.
    pub fn members(&self, player: usize) -> &[usize] {
        &self.members[player]
    }

    /// The player that feature `feature` belongs to.
    pub fn player_of(&self, feature: usize) -> usize {
        self.of_feature[feature]
    }

    /// Marks in `present` (one flag per feature) the features whose player is
    /// in `coalition`.
    pub fn present_features(&self, coalition: Coalition, present: &mut [bool]) {
        for (flag, &player) in present.iter_mut().zip(&self.of_feature) {
            *flag = coalition.contains(player);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strings(items: &[&str]) -> Vec<String> {
        items.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn groups_form_players_in_order_of_first_appearance() {
        let players = Players::try_new(
            &strings(&["income", "rent", "debt_a", "tenure", "debt_b"]),
            &strings(&["", "", "debt", "", "debt"]),
        )
        .unwrap();
        assert_eq!(
            players.names(),
            strings(&["income", "rent", "debt", "tenure"])
        );
        assert_eq!(players.members(2), &[2, 4]);
        let mut present = vec![false; 5];
        players.present_features(Coalition::singleton(2), &mut present);
        assert_eq!(present, vec![false, false, true, false, true]);
    }

    #[test]
    fn clashing_names_are_refused_with_the_field() {
        let err = Players::try_new(&strings(&["a", "b"]), &strings(&["", "a"])).unwrap_err();
        assert_eq!(err.field, "features.group");
        let err = Players::try_new(&strings(&["a", "a"]), &strings(&["", ""])).unwrap_err();
        assert_eq!(err.field, "features.name");
    }
}
