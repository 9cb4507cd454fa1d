//! Intention re-estimation for retraining from a closed-loop block (Gilja
//! et al. 2012). During closed-loop use the decoded velocity is an
//! imperfect copy of what the user meant; the user, though, always meant
//! to go to the target and to stay still on it. So for every bin of a
//! trial the decoded velocity is rotated to point from the cursor at the
//! target, keeping its speed, and set to zero while the cursor is inside
//! the target window. A decoder refit on those labels learns the user's
//! closed-loop activity, including how they stop.

use crate::fit::TrainError;
use crate::formats::block::Block;
use crate::linalg::Mat;

/// How many bins the re-estimation changed, for the report.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Reestimated {
    pub rotated: usize,
    pub zeroed: usize,
    /// Bins outside any trial, left as decoded.
    pub untouched: usize,
}

/// A copy of `block` whose vel_x, vel_y are the re-estimated intention.
/// The block needs pos_x, pos_y (cursor), vel_x, vel_y (decoded) and
/// trials with targets; `window` is the target's acceptance radius.
pub fn reestimate_intention(
    block: &Block,
    window: f64,
) -> Result<(Block, Reestimated), TrainError> {
    let kin = block.kinematics.as_ref().ok_or(TrainError::NoKinematics)?;
    let col = |name: &str| {
        block
            .kinematic_index(name)
            .ok_or_else(|| TrainError::UnknownKinematic {
                name: name.to_string(),
                available: block.kinematic_names.clone(),
            })
    };
    let (px, py, vx, vy) = (col("pos_x")?, col("pos_y")?, col("vel_x")?, col("vel_y")?);
    let trials = block.trials.as_ref().ok_or_else(|| TrainError::Option {
        key: "trials.csv",
        problem: "a closed-loop block needs trials.csv with each trial's target".into(),
    })?;
    if !(window.is_finite() && window >= 0.0) {
        return Err(TrainError::Option {
            key: "--target-radius",
            problem: format!("{window} must be a distance ≥ 0"),
        });
    }
    let mut out: Mat = kin.clone();
    let mut counted = Reestimated::default();
    let mut in_trial = vec![false; block.n_bins];
    for t in trials {
        let end = t.end_bin.min(block.n_bins);
        for (bin, marked) in in_trial.iter_mut().enumerate().take(end).skip(t.start_bin) {
            *marked = true;
            let to = [t.target_x - kin.get(bin, px), t.target_y - kin.get(bin, py)];
            let dist = to[0].hypot(to[1]);
            if dist <= window {
                out.set(bin, vx, 0.0);
                out.set(bin, vy, 0.0);
                counted.zeroed += 1;
            } else {
                let speed = kin.get(bin, vx).hypot(kin.get(bin, vy));
                out.set(bin, vx, to[0] / dist * speed);
                out.set(bin, vy, to[1] / dist * speed);
                counted.rotated += 1;
            }
        }
    }
    counted.untouched = in_trial.iter().filter(|x| !**x).count();
    let mut refit = block.clone();
    refit.kinematics = Some(out);
    refit.notes = Some(format!(
        "{} — velocities re-estimated toward the targets (window {window})",
        block.notes.as_deref().unwrap_or("closed-loop block")
    ));
    Ok((refit, counted))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::formats::block::Trial;

    fn block(pos: [f64; 2], vel: [f64; 2]) -> Block {
        let mut kin = Mat::zeros(1, 4);
        for (c, v) in [pos[0], pos[1], vel[0], vel[1]].iter().enumerate() {
            kin.set(0, c, *v);
        }
        Block {
            input: crate::wire::packet::BinKind::Counts,
            features: Vec::new(),
            bin_width: crate::bin_width::BinWidth::from_us(20_000).unwrap(),
            n_bins: 1,
            n_channels: 1,
            counts: vec![1],
            kinematic_names: ["pos_x", "pos_y", "vel_x", "vel_y"]
                .map(String::from)
                .to_vec(),
            kinematics: Some(kin),
            trials: Some(vec![Trial {
                trial: 0,
                start_bin: 0,
                end_bin: 1,
                target_x: 10.0,
                target_y: 0.0,
            }]),
            channel_labels: None,
            valid: None,
            click: None,
            notes: None,
        }
    }

    #[test]
    fn velocity_is_turned_toward_the_target_keeping_its_speed() {
        // Cursor at the origin moving straight up at 5: the target is to the right.
        let (s, n) = reestimate_intention(&block([0.0, 0.0], [0.0, 5.0]), 2.0).unwrap();
        let k = s.kinematics.unwrap();
        assert!((k.get(0, 2) - 5.0).abs() < 1e-12 && k.get(0, 3).abs() < 1e-12);
        assert_eq!(n.rotated, 1);
    }

    #[test]
    fn velocity_inside_the_target_is_zero() {
        let (s, n) = reestimate_intention(&block([9.0, 0.5], [3.0, -4.0]), 2.0).unwrap();
        let k = s.kinematics.unwrap();
        assert_eq!((k.get(0, 2), k.get(0, 3)), (0.0, 0.0));
        assert_eq!(n.zeroed, 1);
    }
}
