//! Finding a fog-grid map file: a map given as a path is read relative to the spec
//! file (or preset) that names it, and must exist.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::Checker;
use crate::model::Value;
use crate::tasks;
use crate::tree::SrcKind;

impl Checker<'_> {
    pub(super) fn fog_grid_map(&mut self, settings: &mut BTreeMap<String, Value>) {
        let Some(Value::Str(map)) = settings.get("map").cloned() else {
            return;
        };
        if tasks::FOG_GRID_MAPS.contains(&map.as_str()) || !self.files {
            return;
        }
        let Some(g) = self.vals.get("task.map").cloned() else {
            self.internal("task.map", "a fog-grid map setting with no location".into());
            return;
        };
        let base: Option<PathBuf> = match self.cx.kind(&g.at) {
            SrcKind::Main(p) | SrcKind::Preset(p) => p.parent().map(Path::to_path_buf),
            _ => None,
        };
        let full = match base {
            Some(b) if Path::new(&map).is_relative() => b.join(&map),
            _ => PathBuf::from(&map),
        };
        if !full.is_file() {
            self.err(
                &g.at,
                "task.map",
                format!("fog-grid map file {} does not exist", full.display()),
                Some("a built-in map name or a path relative to this spec".into()),
                None,
            );
            return;
        }
        settings.insert("map".into(), Value::Str(full.display().to_string()));
    }
}
