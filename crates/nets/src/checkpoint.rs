//! Checkpoints: one safetensors file holding the online network, optionally the target
//! network and the Adam moments, with metadata so a run can resume from it alone.
//!
//! Tensor names: `online/<param>`, `target/<param>`, `adam.m/<param>`, `adam.v/<param>`.
//! Metadata: `format` (= `mnemon-checkpoint`), `format_version`, `mnemon_version`, `spec`
//! (the resolved spec as TOML text), `env_steps`, `learner_steps`, `adam_step`,
//! `adam_eps`, `adam_clip`, `checksum` (FNV-1a 64 over every tensor's name, shape and
//! bytes, in name order) and `extra.<key>` for the engine's own counters.
//! Writes are atomic: a temp file in the same folder, fsync, rename, fsync of the folder.

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use safetensors::tensor::{Dtype, TensorView};

use crate::error::{Error, Result};
use crate::network::{Network, Params};
use crate::optim::Optimizer;

/// Tensors of one file grouped by their prefix (`online`, `target`, ...).
type TensorGroups<'a> = BTreeMap<&'a str, Vec<(String, Vec<usize>, Vec<f32>)>>;

/// Value of the `format` metadata key.
pub const FORMAT: &str = "mnemon-checkpoint";
/// The checkpoint layout version this build writes and reads.
pub const FORMAT_VERSION: u32 = 1;

/// Counters and text stored beside the tensors.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Meta {
    /// The resolved spec, as TOML text.
    pub spec_toml: String,
    /// Env steps taken when the checkpoint was written.
    pub env_steps: u64,
    /// Learner steps taken.
    pub learner_steps: u64,
    /// Other counters (RNG seeds, replay-free resume state), by name.
    pub extra: BTreeMap<String, String>,
}

/// One tensor's entry in the table `mnemon inspect` prints.
#[derive(Debug, Clone, PartialEq)]
pub struct TensorEntry {
    /// Full name in the file (`online/torso.0.weight`, ...).
    pub name: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// Element type (always `F32` in files this build writes).
    pub dtype: String,
}

impl TensorEntry {
    /// Number of scalars.
    pub fn count(&self) -> usize {
        self.shape.iter().product()
    }
}

/// A checkpoint read back.
#[derive(Debug, Clone)]
pub struct Loaded {
    /// Counters and spec.
    pub meta: Meta,
    /// The mnemon version that wrote the file.
    pub mnemon_version: String,
    /// The online network's parameters.
    pub online: Params,
    /// The target network's parameters, if saved.
    pub target: Option<Params>,
    /// The optimizer state, if saved (moments in the online network's order).
    pub optimizer: Option<Optimizer>,
    /// Every tensor in the file, in name order.
    pub tensors: Vec<TensorEntry>,
}

fn io_err(path: &Path, source: std::io::Error) -> Error {
    Error::Io {
        path: path.to_path_buf(),
        source,
    }
}

fn bad(path: &Path, reason: impl Into<String>) -> Error {
    Error::Checkpoint {
        path: path.to_path_buf(),
        reason: reason.into(),
    }
}

/// FNV-1a 64 over names, shapes and bytes, in the order given.
fn checksum<'a>(items: impl Iterator<Item = (&'a str, &'a [usize], &'a [u8])>) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |bytes: &[u8]| {
        for &b in bytes {
            h ^= b as u64;
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    for (name, shape, data) in items {
        eat(name.as_bytes());
        for d in shape {
            eat(&(*d as u64).to_le_bytes());
        }
        eat(data);
    }
    h
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Writes a checkpoint atomically.
pub fn save(
    path: &Path,
    online: &Network,
    target: Option<&Network>,
    optimizer: Option<&Optimizer>,
    meta: &Meta,
) -> Result<()> {
    let mut entries: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    for (name, shape, values) in online.snapshot()?.tensors {
        entries.push((format!("online/{name}"), shape, f32_bytes(&values)));
    }
    if let Some(t) = target {
        for (name, shape, values) in t.snapshot()?.tensors {
            entries.push((format!("target/{name}"), shape, f32_bytes(&values)));
        }
    }
    if let Some(opt) = optimizer {
        for (i, name) in opt.names.iter().enumerate() {
            let shape = online
                .vars()
                .iter()
                .find(|(n, _)| n == name)
                .map(|(_, v)| v.dims().to_vec())
                .ok_or_else(|| {
                    Error::shape(
                        "checkpoint save",
                        "an optimizer made for this network",
                        format!("moments for {name}"),
                    )
                })?;
            entries.push((
                format!("adam.m/{name}"),
                shape.clone(),
                f32_bytes(&opt.m[i]),
            ));
            entries.push((format!("adam.v/{name}"), shape, f32_bytes(&opt.v[i])));
        }
    }
    entries.sort_by(|a, b| a.0.cmp(&b.0));
    let sum = checksum(
        entries
            .iter()
            .map(|(n, s, d)| (n.as_str(), s.as_slice(), d.as_slice())),
    );
    let mut md: HashMap<String, String> = HashMap::new();
    md.insert("format".into(), FORMAT.into());
    md.insert("format_version".into(), FORMAT_VERSION.to_string());
    md.insert("mnemon_version".into(), env!("CARGO_PKG_VERSION").into());
    md.insert("spec".into(), meta.spec_toml.clone());
    md.insert("env_steps".into(), meta.env_steps.to_string());
    md.insert("learner_steps".into(), meta.learner_steps.to_string());
    md.insert("checksum".into(), format!("{sum:016x}"));
    if let Some(opt) = optimizer {
        md.insert("adam_step".into(), opt.t.to_string());
        md.insert("adam_eps".into(), opt.eps.to_string());
        md.insert("adam_clip".into(), opt.clip.to_string());
        md.insert("adam_betas".into(), format!("{},{}", opt.beta1, opt.beta2));
    }
    for (k, v) in &meta.extra {
        md.insert(format!("extra.{k}"), v.clone());
    }
    let views: Vec<(String, TensorView<'_>)> = entries
        .iter()
        .map(|(n, s, d)| TensorView::new(Dtype::F32, s.clone(), d).map(|v| (n.clone(), v)))
        .collect::<std::result::Result<_, _>>()
        .map_err(|e| bad(path, format!("cannot encode tensors: {e}")))?;
    let bytes = safetensors::serialize(views, Some(md))
        .map_err(|e| bad(path, format!("cannot encode: {e}")))?;
    write_atomic(path, &bytes)
}

/// Writes `bytes` to `path` atomically (`mnemon_runs::write_atomic`: temp file in the
/// same folder, fsync, rename).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    mnemon_runs::write_atomic(path, bytes).map_err(|e| match e {
        mnemon_runs::Error::Io { path, source } => io_err(&path, source),
        other => bad(path, other.to_string()),
    })
}

/// Reads a checkpoint, checking format, version and checksum.
pub fn load(path: &Path) -> Result<Loaded> {
    let bytes = std::fs::read(path).map_err(|e| io_err(path, e))?;
    parse(path, &bytes)
}

fn parse_u64(path: &Path, md: &HashMap<String, String>, key: &str) -> Result<u64> {
    let v = md
        .get(key)
        .ok_or_else(|| bad(path, format!("metadata has no `{key}`")))?;
    v.parse().map_err(|_| {
        bad(
            path,
            format!("metadata `{key}` is not a whole number: {v:?}"),
        )
    })
}

/// Parses checkpoint bytes (`path` only names the file in errors).
pub fn parse(path: &Path, bytes: &[u8]) -> Result<Loaded> {
    let st = safetensors::SafeTensors::deserialize(bytes).map_err(|e| {
        bad(
            path,
            format!("not a readable safetensors file (truncated or corrupt?): {e}"),
        )
    })?;
    let (_, header) = safetensors::SafeTensors::read_metadata(bytes)
        .map_err(|e| bad(path, format!("unreadable header: {e}")))?;
    let md = header.metadata().clone().unwrap_or_default();
    match md.get("format") {
        Some(f) if f == FORMAT => {}
        Some(f) => {
            return Err(bad(
                path,
                format!("a safetensors file of format {f:?}, not a mnemon checkpoint"),
            ))
        }
        None => {
            return Err(bad(
                path,
                "a safetensors file without mnemon metadata, not a mnemon checkpoint",
            ))
        }
    }
    let version = parse_u64(path, &md, "format_version")?;
    if version != FORMAT_VERSION as u64 {
        return Err(bad(
            path,
            format!(
                "checkpoint format version {version}; this mnemon reads version {FORMAT_VERSION}"
            ),
        ));
    }
    let mut names: Vec<String> = st.names().into_iter().map(String::from).collect();
    names.sort();
    let mut tensors = Vec::new();
    let mut data: Vec<(String, Vec<usize>, &[u8])> = Vec::new();
    for n in &names {
        let view = st
            .tensor(n)
            .map_err(|e| bad(path, format!("tensor {n}: {e}")))?;
        if view.dtype() != Dtype::F32 {
            return Err(bad(
                path,
                format!(
                    "tensor {n} has type {:?}; mnemon checkpoints hold F32",
                    view.dtype()
                ),
            ));
        }
        tensors.push(TensorEntry {
            name: n.clone(),
            shape: view.shape().to_vec(),
            dtype: format!("{:?}", view.dtype()),
        });
        data.push((n.clone(), view.shape().to_vec(), view.data()));
    }
    let want = md
        .get("checksum")
        .ok_or_else(|| bad(path, "metadata has no `checksum`"))?;
    let got = format!(
        "{:016x}",
        checksum(data.iter().map(|(n, s, d)| (n.as_str(), s.as_slice(), *d)))
    );
    if &got != want {
        return Err(bad(
            path,
            format!("checksum mismatch (stored {want}, computed {got}): the file is damaged"),
        ));
    }
    let mut groups: TensorGroups<'_> = BTreeMap::new();
    for (n, s, d) in &data {
        let Some((group, name)) = n.split_once('/') else {
            return Err(bad(path, format!("unexpected tensor name {n:?}")));
        };
        let values = d
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect();
        groups
            .entry(group)
            .or_default()
            .push((name.to_string(), s.clone(), values));
    }
    let online = Params {
        tensors: groups
            .remove("online")
            .ok_or_else(|| bad(path, "no online network tensors"))?,
    };
    let target = groups.remove("target").map(|tensors| Params { tensors });
    let optimizer = match (groups.remove("adam.m"), groups.remove("adam.v")) {
        (Some(m), Some(v)) => {
            if m.len() != v.len() || m.iter().zip(&v).any(|(a, b)| a.0 != b.0) {
                return Err(bad(
                    path,
                    "the Adam first and second moments name different tensors",
                ));
            }
            let float = |k: &str| -> Result<f64> {
                md.get(k)
                    .and_then(|v| v.parse().ok())
                    .ok_or_else(|| bad(path, format!("metadata `{k}` missing or not a number")))
            };
            let betas = md
                .get("adam_betas")
                .cloned()
                .unwrap_or_else(|| "0.9,0.999".into());
            let (b1, b2) = betas
                .split_once(',')
                .and_then(|(a, b)| Some((a.parse().ok()?, b.parse().ok()?)))
                .ok_or_else(|| bad(path, "metadata `adam_betas` malformed"))?;
            Some(Optimizer {
                beta1: b1,
                beta2: b2,
                eps: float("adam_eps")?,
                clip: float("adam_clip")?,
                t: parse_u64(path, &md, "adam_step")?,
                names: m.iter().map(|x| x.0.clone()).collect(),
                m: m.into_iter().map(|x| x.2).collect(),
                v: v.into_iter().map(|x| x.2).collect(),
            })
        }
        (None, None) => None,
        _ => return Err(bad(path, "only one of the Adam moment sets is present")),
    };
    if let Some(other) = groups.keys().next() {
        return Err(bad(path, format!("unknown tensor group {other:?}")));
    }
    let extra = md
        .iter()
        .filter_map(|(k, v)| k.strip_prefix("extra.").map(|k| (k.to_string(), v.clone())))
        .collect();
    Ok(Loaded {
        meta: Meta {
            spec_toml: md.get("spec").cloned().unwrap_or_default(),
            env_steps: parse_u64(path, &md, "env_steps")?,
            learner_steps: parse_u64(path, &md, "learner_steps")?,
            extra,
        },
        mnemon_version: md.get("mnemon_version").cloned().unwrap_or_default(),
        online,
        target,
        optimizer,
        tensors,
    })
}

impl Loaded {
    /// Puts the saved values into networks and an optimizer built from the spec; any
    /// name or shape that differs from what the spec builds is an error naming it.
    pub fn restore(
        &self,
        online: &mut Network,
        target: Option<&mut Network>,
        optimizer: Option<&mut Optimizer>,
    ) -> Result<()> {
        online.load_params(&self.online)?;
        if let Some(t) = target {
            t.load_params(
                self.target
                    .as_ref()
                    .ok_or_else(|| Error::Spec("the checkpoint holds no target network".into()))?,
            )?;
        }
        if let Some(o) = optimizer {
            let saved = self
                .optimizer
                .as_ref()
                .ok_or_else(|| Error::Spec("the checkpoint holds no optimizer state".into()))?;
            let mut restored = saved.clone();
            // Put the moments in the network's parameter order.
            restored.names = o.names.clone();
            restored.m = o.m.clone();
            restored.v = o.v.clone();
            if saved.names.len() != o.names.len() {
                return Err(Error::shape(
                    "optimizer state",
                    format!("moments for {} tensors", o.names.len()),
                    format!("{}", saved.names.len()),
                ));
            }
            for (i, name) in o.names.iter().enumerate() {
                let j = saved.names.iter().position(|n| n == name).ok_or_else(|| {
                    Error::shape("optimizer state", format!("moments for {name}"), "none")
                })?;
                if saved.m[j].len() != o.m[i].len() {
                    return Err(Error::shape(
                        "optimizer state",
                        format!("{name} with {} values", o.m[i].len()),
                        format!("{}", saved.m[j].len()),
                    ));
                }
                restored.m[i] = saved.m[j].clone();
                restored.v[i] = saved.v[j].clone();
            }
            *o = restored;
        }
        Ok(())
    }
}
