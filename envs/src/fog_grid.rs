//! `fog-grid`: a warehouse robot (mnemon's own scenario). It enters the hall at S,
//! where a sign says which of two loading bays, A or B, takes today's delivery;
//! then it drives through the hall seeing only a `view` x `view` window around
//! itself. Reaching the right bay pays +1 (success), the wrong bay 0 (failure);
//! both end the episode (terminal). Every step costs 0.01; `time_limit` truncates.
//!
//! Observation: an image of 5 channels x view x view, centred on the robot, north
//! up: walls (cells outside the map count as walls), bay A, bay B, and two sign
//! planes (all ones for "A" or for "B"), lit only on the first observation. After
//! the first step nothing shows which bay is right.
//!
//! Maps are ASCII files (`envs/maps/*.txt`; built in: `depot`, `aisles`): `#` wall,
//! `.` floor, `S` start (exactly one), `A` / `B` bay cells (at least one each,
//! reachable from S); lines starting with `;` are comments; short rows are padded
//! with walls. `map` may also be a path to a user's own file.

use std::collections::VecDeque;

use mnemon_spec::TaskSpec;

use crate::registry::{bad_action, count, text};
use crate::rng::Rng;
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, Task, TaskError};

/// Built-in maps: (name, text).
pub const BUILTIN_MAPS: [(&str, &str); 2] = [
    ("depot", include_str!("../maps/depot.txt")),
    ("aisles", include_str!("../maps/aisles.txt")),
];

/// Channels of the observation.
pub const CHANNELS: usize = 5;
/// Reward for the right bay.
pub const DELIVERY_REWARD: f32 = 1.0;
/// Cost of every step.
pub const STEP_COST: f32 = 0.01;

const FLOOR: u8 = 0;
const WALL: u8 = 1;
const BAY_A: u8 = 2;
const BAY_B: u8 = 3;

/// A parsed, validated map.
#[derive(Debug, Clone, PartialEq)]
pub struct Map {
    width: usize,
    height: usize,
    cells: Vec<u8>,
    start: (usize, usize),
}

impl Map {
    /// Parse map text; `name` is used in error messages.
    pub fn parse(name: &str, text: &str) -> Result<Map, TaskError> {
        let err = |problem: String| TaskError::Map {
            map: name.to_string(),
            problem,
        };
        let mut rows: Vec<(usize, &str)> = Vec::new();
        for (i, line) in text.lines().enumerate() {
            let line = line.trim_end();
            if line.starts_with(';') || line.is_empty() {
                continue;
            }
            rows.push((i + 1, line));
        }
        if rows.is_empty() {
            return Err(err("no map rows (only comments or blank lines)".into()));
        }
        let height = rows.len();
        let width = rows
            .iter()
            .map(|(_, r)| r.chars().count())
            .max()
            .unwrap_or(0);
        if height > 256 || width > 256 {
            return Err(err(format!(
                "{width} x {height} cells; at most 256 x 256 allowed"
            )));
        }
        let mut cells = vec![WALL; width * height];
        let mut start = None;
        let (mut a, mut b) = (0, 0);
        for (r, (line_no, row)) in rows.iter().enumerate() {
            for (c, ch) in row.chars().enumerate() {
                cells[r * width + c] = match ch {
                    '#' => WALL,
                    '.' => FLOOR,
                    'A' => {
                        a += 1;
                        BAY_A
                    }
                    'B' => {
                        b += 1;
                        BAY_B
                    }
                    'S' => {
                        if start.is_some() {
                            return Err(err(format!(
                                "line {line_no}, column {}: a second start S; exactly one is allowed",
                                c + 1
                            )));
                        }
                        start = Some((r, c));
                        FLOOR
                    }
                    other => {
                        return Err(err(format!(
                            "line {line_no}, column {}: unexpected character {other:?}; expected one of # . S A B",
                            c + 1
                        )))
                    }
                };
            }
        }
        let Some(start) = start else {
            return Err(err("no start cell S".into()));
        };
        if a == 0 || b == 0 {
            return Err(err(
                "needs at least one A cell and one B cell (the two bays)".into(),
            ));
        }
        let map = Map {
            width,
            height,
            cells,
            start,
        };
        let (reach_a, reach_b) = map.reachable_bays();
        if !reach_a || !reach_b {
            return Err(err(format!(
                "bay {} cannot be reached from the start S",
                if reach_a { "B" } else { "A" }
            )));
        }
        Ok(map)
    }

    /// A built-in map by name, or a map file at that path.
    pub fn load(name_or_path: &str) -> Result<Map, TaskError> {
        if let Some((name, text)) = BUILTIN_MAPS.iter().find(|(n, _)| *n == name_or_path) {
            return Map::parse(name, text);
        }
        match std::fs::read_to_string(name_or_path) {
            Ok(text) => Map::parse(name_or_path, &text),
            Err(e) => {
                let names: Vec<&str> = BUILTIN_MAPS.iter().map(|(n, _)| *n).collect();
                Err(TaskError::Map {
                    map: name_or_path.to_string(),
                    problem: format!(
                        "not a built-in map ({}) and the file cannot be read: {e}",
                        names.join(", ")
                    ),
                })
            }
        }
    }

    fn cell(&self, r: isize, c: isize) -> u8 {
        if r < 0 || c < 0 || r as usize >= self.height || c as usize >= self.width {
            WALL
        } else {
            self.cells[r as usize * self.width + c as usize]
        }
    }

    fn reachable_bays(&self) -> (bool, bool) {
        let mut seen = vec![false; self.cells.len()];
        let mut queue = VecDeque::from([self.start]);
        seen[self.start.0 * self.width + self.start.1] = true;
        let (mut a, mut b) = (false, false);
        while let Some((r, c)) = queue.pop_front() {
            match self.cells[r * self.width + c] {
                BAY_A => {
                    a = true;
                    continue;
                }
                BAY_B => {
                    b = true;
                    continue;
                }
                _ => {}
            }
            for (dr, dc) in [(-1isize, 0isize), (0, 1), (1, 0), (0, -1)] {
                let (nr, nc) = (r as isize + dr, c as isize + dc);
                if self.cell(nr, nc) != WALL {
                    let i = nr as usize * self.width + nc as usize;
                    if !seen[i] {
                        seen[i] = true;
                        queue.push_back((nr as usize, nc as usize));
                    }
                }
            }
        }
        (a, b)
    }
}

/// The fog-grid task.
#[derive(Debug, Clone)]
pub struct FogGrid {
    map: Map,
    view: usize,
    time_limit: usize,
    pos: (isize, isize),
    right_bay_a: bool,
    t: usize,
    running: bool,
}

impl FogGrid {
    /// A task on `map` with an odd `view` (>= 3) and a time limit.
    pub fn new(map: Map, view: usize, time_limit: usize) -> Self {
        let pos = (map.start.0 as isize, map.start.1 as isize);
        FogGrid {
            map,
            view,
            time_limit,
            pos,
            right_bay_a: true,
            t: 0,
            running: false,
        }
    }
    pub(crate) fn from_spec(spec: &TaskSpec) -> Result<Self, TaskError> {
        // The task table keeps view odd and in 3..=31 (`mnemon_spec::tasks`).
        let view = count(spec, "view")?;
        let limit = count(spec, "time_limit")?;
        let map = Map::load(text(spec, "map")?)?;
        Ok(Self::new(map, view, limit))
    }
    /// Whether bay A is the right one this episode.
    pub fn right_bay_is_a(&self) -> bool {
        self.right_bay_a
    }
    /// Robot position (row, column).
    pub fn position(&self) -> (usize, usize) {
        (self.pos.0 as usize, self.pos.1 as usize)
    }
    fn write_obs(&self, obs: &mut [f32]) {
        let v = self.view;
        let plane = v * v;
        obs.fill(0.0);
        let half = (v / 2) as isize;
        for i in 0..v {
            for j in 0..v {
                let cell = self.map.cell(
                    self.pos.0 + i as isize - half,
                    self.pos.1 + j as isize - half,
                );
                let ch = match cell {
                    WALL => 0,
                    BAY_A => 1,
                    BAY_B => 2,
                    _ => continue,
                };
                obs[ch * plane + i * v + j] = 1.0;
            }
        }
        if self.t == 0 {
            let sign = if self.right_bay_a { 3 } else { 4 };
            obs[sign * plane..(sign + 1) * plane].fill(1.0);
        }
    }
}

impl Task for FogGrid {
    fn obs_space(&self) -> ObsSpace {
        ObsSpace::Image {
            channels: CHANNELS,
            height: self.view,
            width: self.view,
        }
    }
    fn action_space(&self) -> ActionSpace {
        ActionSpace::from_names(&["north", "east", "south", "west"])
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len("fog-grid", obs, CHANNELS * self.view * self.view)?;
        self.right_bay_a = Rng::new(seed).chance(0.5);
        self.pos = (self.map.start.0 as isize, self.map.start.1 as isize);
        self.t = 0;
        self.running = true;
        self.write_obs(obs);
        Ok(())
    }
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: "fog-grid".into(),
            });
        }
        if action >= 4 {
            return Err(bad_action("fog-grid", action, 4));
        }
        check_obs_len("fog-grid", obs, CHANNELS * self.view * self.view)?;
        let (dr, dc) = [(-1, 0), (0, 1), (1, 0), (0, -1)][action];
        let next = (self.pos.0 + dr, self.pos.1 + dc);
        let cell = self.map.cell(next.0, next.1);
        if cell != WALL {
            self.pos = next;
        }
        self.t += 1;
        let mut reward = -STEP_COST;
        let (mut ending, mut success) = (Ending::Running, None);
        if cell == BAY_A || cell == BAY_B {
            let right = (cell == BAY_A) == self.right_bay_a;
            if right {
                reward += DELIVERY_REWARD;
            }
            ending = Ending::Terminal;
            success = Some(right);
        } else if self.t >= self.time_limit {
            ending = Ending::Truncated;
            success = Some(false);
        }
        self.running = ending == Ending::Running;
        self.write_obs(obs);
        Ok(Outcome {
            reward,
            ending,
            success,
        })
    }
    fn has_success(&self) -> bool {
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tmaze::{EAST, NORTH, SOUTH, WEST};

    fn depot() -> FogGrid {
        FogGrid::new(Map::load("depot").unwrap(), 5, 100)
    }

    #[test]
    fn builtin_maps_parse_and_bad_maps_are_rejected_with_location() {
        for (name, _) in BUILTIN_MAPS {
            Map::load(name).unwrap();
        }
        let e = Map::parse("x", "#####\n#S.A#\n#.X.#\n#B..#\n#####")
            .unwrap_err()
            .to_string();
        assert!(e.contains("line 3, column 3") && e.contains("'X'"), "{e}");
        let e = Map::parse("x", "#####\n#S#A#\n#B..#\n#####")
            .unwrap_err()
            .to_string();
        assert!(e.contains("bay A cannot be reached"), "{e}");
        let e = Map::parse("x", "#S.A#").unwrap_err().to_string();
        assert!(e.contains("B cell"), "{e}");
        let e = Map::load("no/such/map.txt").unwrap_err().to_string();
        assert!(e.contains("depot") && e.contains("no/such/map.txt"), "{e}");
    }

    #[test]
    fn the_sign_shows_only_on_the_first_step() {
        let mut g = depot();
        let n = CHANNELS * 25;
        let mut obs = vec![0.0; n];
        g.reset(1, &mut obs).unwrap();
        let sign = if g.right_bay_is_a() { 3 } else { 4 };
        assert!(obs[sign * 25..(sign + 1) * 25].iter().all(|&v| v == 1.0));
        assert!(obs[(7 - sign) * 25..(8 - sign) * 25]
            .iter()
            .all(|&v| v == 0.0));
        g.step(NORTH, &mut obs).unwrap();
        assert!(obs[3 * 25..].iter().all(|&v| v == 0.0));
        // centre cell is never a wall
        assert_eq!(obs[12], 0.0);
    }

    /// Scripted route on the depot map: 4 north, then 4 west or east, then 2 north.
    fn route(left: bool) -> Vec<usize> {
        let side = if left { WEST } else { EAST };
        [vec![NORTH; 4], vec![side; 4], vec![NORTH; 2]].concat()
    }

    #[test]
    fn reading_the_sign_delivers_and_a_memoryless_route_succeeds_half_the_time() {
        let mut g = depot();
        let mut obs = vec![0.0; CHANNELS * 25];
        let (mut remembered, mut fixed) = (0, 0);
        let episodes = 400;
        for seed in 0..episodes {
            for use_sign in [true, false] {
                g.reset(seed, &mut obs).unwrap();
                let left = if use_sign { obs[3 * 25] == 1.0 } else { true };
                let mut last = None;
                for a in route(left) {
                    last = Some(g.step(a, &mut obs).unwrap());
                }
                let out = last.unwrap();
                assert_eq!(out.ending, Ending::Terminal);
                if out.success == Some(true) {
                    assert!((out.reward - (DELIVERY_REWARD - STEP_COST)).abs() < 1e-6);
                    if use_sign {
                        remembered += 1
                    } else {
                        fixed += 1
                    }
                }
            }
        }
        assert_eq!(remembered, episodes);
        // a fixed route reaches bay A every time; it is right with probability 1/2
        let p = fixed as f64 / episodes as f64;
        assert!(
            (p - 0.5).abs() < 4.0 * (0.25 / episodes as f64).sqrt(),
            "{p}"
        );
    }

    #[test]
    fn walls_block_and_time_limit_truncates() {
        let mut g = FogGrid::new(Map::load("depot").unwrap(), 3, 2);
        let mut obs = vec![0.0; CHANNELS * 9];
        g.reset(0, &mut obs).unwrap();
        let start = g.position();
        let out = g.step(SOUTH, &mut obs).unwrap();
        assert_eq!(g.position(), start);
        assert_eq!(out.ending, Ending::Running);
        let out = g.step(WEST, &mut obs).unwrap();
        assert_eq!((out.ending, out.success), (Ending::Truncated, Some(false)));
    }
}
