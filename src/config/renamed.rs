//! Keys and values that earlier versions of simtide spelled differently.
//!
//! A file written for an older version would otherwise fail with a bare "unknown field"
//! (or "unknown variant") error; this check names the replacement so the operator can fix
//! the file in one step. It runs on the merged table, so environment overrides that use
//! an old name are caught the same way.

use anyhow::{bail, Result};

/// `(section, old key, new key)` of every renamed key.
const RENAMED_KEYS: &[(&str, &str, &str)] = &[
    ("similarity", "min_support", "min_common_users"),
    ("similarity", "shrinkage", "damping"),
];

/// `(section, key, old value, new value)` of every renamed string value.
const RENAMED_VALUES: &[(&str, &str, &str, &str)] =
    &[("similarity", "purchase_score", "llr", "log_likelihood")];

/// Refuses the first old key or value found in `table`, naming what replaces it.
pub fn refuse_old_names(table: &toml::Table, origin: &str) -> Result<()> {
    let section = |name: &str| table.get(name).and_then(toml::Value::as_table);
    for (name, old, new) in RENAMED_KEYS {
        if section(name).is_some_and(|s| s.contains_key(*old)) {
            bail!("{origin}: {name}.{old} was renamed: write {name}.{new} instead");
        }
    }
    for (name, key, old, new) in RENAMED_VALUES {
        let value = section(name)
            .and_then(|s| s.get(*key))
            .and_then(toml::Value::as_str);
        if value == Some(*old) {
            bail!("{origin}: {name}.{key} = \"{old}\" was renamed: write \"{new}\" instead");
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(text: &str) -> String {
        let table: toml::Table = toml::from_str(text).unwrap();
        refuse_old_names(&table, "f.toml").map_or_else(|e| e.to_string(), |()| "ok".into())
    }

    #[test]
    fn each_old_name_is_refused_with_its_replacement() {
        assert_eq!(
            check("[similarity]\nmin_support = 3\n"),
            "f.toml: similarity.min_support was renamed: write similarity.min_common_users instead"
        );
        assert!(check("[similarity]\nshrinkage = 5.0\n").contains("write similarity.damping instead"));
        assert!(
            check("[similarity]\npurchase_score = \"llr\"\n").contains("write \"log_likelihood\" instead")
        );
    }

    #[test]
    fn current_names_pass() {
        assert_eq!(
            check("[similarity]\nmin_common_users = 3\ndamping = 5.0\npurchase_score = \"log_likelihood\"\n"),
            "ok"
        );
    }
}
