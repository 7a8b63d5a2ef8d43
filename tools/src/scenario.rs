//! The demo scenario: an invented greenhouse ventilation line, simulated.
//!
//! A deterministic generator of the four sensor signals of one fan (3-axis
//! vibration of the motor's bearing housing and one motor phase current)
//! during normal running and during injected faults, with per-sample labels.
//! Everything it needs is in the scenario file (`demo-data/scenario.toml`,
//! loaded by [`Scenario::load`]): machine parameters, fault parameters, and
//! per data set a seed, a length and a fault schedule. The same file and the
//! same generator give the same bits ([`content_hash`] pins them in
//! `tools/tests/scenario_hash.rs`).
//!
//! The scenario is invented for the demo: no real machine, site or product
//! is modelled. The physics is deliberately simple (textbook relations, no
//! fitted data); the aim is a signal that is realistic in kind, cheap to
//! generate, and learnable by a small LSTM next-step predictor.
//!
//! # Notation
//!
//! `fs` sample rate (400 Hz in the demo), `dt = 1/fs`, sample `n` at time
//! `t = n dt`. `N(0,1)` is a standard normal draw, `U(a,b)` a uniform draw.
//! Angles of sines are in radians; phases given in the file are in degrees.
//!
//! # Drive and speed
//!
//! The fan is driven by a 2-pole induction motor on a variable-frequency
//! drive. The drive's output (electrical) frequency follows a speed
//! setpoint `u(t)`:
//!
//! ```text
//! f_e(t) = supply_hz * (1 + u(t))
//! ```
//!
//! `u` is piecewise constant (the climate controller's speed stages): each
//! stage's level is `U(-setpoint_range, +setpoint_range)`, it lasts
//! `U(dwell_s[0], dwell_s[1])` seconds, and the drive ramps linearly from the
//! previous level over `ramp_s` seconds. The first stage starts before `t =
//! 0` (no ramp at the start of a set).
//!
//! The load factor `L(t)` (air flow against the greenhouse's pressure
//! difference: vents, wind) is an Ornstein-Uhlenbeck process around 1,
//! updated once per sample and floored at `load.floor`:
//!
//! ```text
//! l[n+1] = a l[n] + sigma sqrt(1 - a^2) N(0,1),  a = exp(-dt / tau_s),  L = max(1 + l, floor)
//! ```
//!
//! (`l[0]` is drawn from the stationary distribution `sigma N(0,1)`).
//! The load torque relative to rated follows the fan law (torque grows with
//! the square of speed, common practice), with the current-surge fault's
//! torque multiplier `M(t)` (1 outside a surge):
//!
//! ```text
//! T(t) = L(t) * M(t) * (f_e / supply_hz)^2
//! ```
//!
//! The induction motor's slip is proportional to torque below breakdown
//! (the linear part of the torque-slip curve, common practice), capped at
//! `max_slip`, and the shaft turns at
//!
//! ```text
//! s = min(rated_slip * T, max_slip),   f_r = f_e (1 - s)
//! ```
//!
//! With the demo's `supply_hz = 25`, `rated_slip = 0.04`: `f_r = 24 Hz` at
//! nominal setpoint and load. The shaft angle and the electrical angle are
//! integrated sample by sample (`theta_r += 2 pi f_r dt`, `theta_e += 2 pi f_e
//! dt`), so speed changes are phase-continuous. `g = f_r / f_r0` is the speed
//! relative to nominal (`f_r0 = supply_hz (1 - rated_slip)`).
//!
//! # Vibration (mm/s, velocity)
//!
//! Bearing-housing vibration velocity in mm/s on axes `a = x, y` (radial,
//! horizontal and vertical) and `z` (axial). Per axis, with the file's peak
//! amplitudes `A` (at nominal speed) and phases `phi`:
//!
//! ```text
//! v_a = g^2 [ A1_a sin(theta_r + phi1_a) + A2_a sin(2 theta_r + phi2_a) ]
//!     + g^2 L Ab_a sin(B theta_r + phib_a)
//!     + sigma_a N(0,1)
//! ```
//!
//! - 1x: the residual imbalance of a healthy fan wheel; its force grows with
//!   the square of speed (centrifugal force `m e w^2`), and so, in this
//!   simplified model, does the response;
//! - 2x: residual misalignment of the coupling;
//! - blade pass at `B = blades` times shaft speed (6 blades: 144 Hz at
//!   24 Hz, below the 200 Hz Nyquist limit), growing with speed squared and
//!   with load (the aerodynamic pressure pulses);
//! - white sensor and process noise with standard deviation `sigma_a`.
//!
//! Normal running is thus dominated by three periodic components with
//! slowly varying frequency, plus moderate noise: predictable for a
//! next-step predictor, with a residual floor set by the noise.
//!
//! # Motor current (A, instantaneous)
//!
//! The instantaneous current of one motor phase as a Hall-effect current
//! sensor sees it (no DC: the drive's output is AC at `f_e`, about 25 Hz,
//! 16 samples per cycle at 400 Hz). Its RMS magnitude combines the
//! magnetizing current (constant at constant volts per hertz) and the
//! torque-producing current (proportional to torque) in quadrature:
//!
//! ```text
//! I(t) = sqrt(I_m^2 + (I_t T)^2)
//! i(t) = sqrt(2) I(t) [ sin(theta_e) + h5 sin(5 theta_e + phi5) ] + sigma_i N(0,1)
//! ```
//!
//! `h5` is the drive's 5th-harmonic content (125 Hz at 25 Hz, below
//! Nyquist). The demo: `I_m = 1.1 A`, `I_t = 2.0 A`, about 2.3 A RMS
//! (3.2 A peak) at nominal load. Because speed (slip), current and blade
//! pass all depend on the same `T`, the channels are physically coupled.
//!
//! # Sensors
//!
//! Every channel goes through an ideal ADC with `adc_bits` bits over
//! `+-full_scale`: `q = clamp(round(v / lsb), -2^(bits-1), 2^(bits-1) - 1) lsb`,
//! `lsb = 2 full_scale / 2^bits` (the demo: 16 bits over +-32 mm/s gives
//! `lsb = 2^-10 mm/s`, over +-16 A gives `2^-11 A`; far below the noise). The
//! output values are exact multiples of the LSB, so they are exact `f32`s,
//! and the grid also makes the output robust against last-bit differences of
//! the platform's `sin`/`exp`/`ln` (a value only changes if a 1e-16 error
//! lands on a rounding boundary of a 1e-3 grid).
//!
//! # Faults
//!
//! Each fault is an event `[start, end)` in samples (from `start_s` and
//! `duration_s` in the file, rounded to the nearest sample) with a
//! `severity` multiplier (1 by default) on its amplitudes. Its effect is
//! confined to the event, and every sample in it is labelled 1. Each event
//! draws its own random numbers (its own stream), so adding an event never
//! changes the normal signal's noise elsewhere.
//!
//! **Imbalance** (fouling or erosion of the fan wheel, time-compressed to
//! minutes): an extra rotating 1x force whose amplitude ramps linearly from 0
//! to `severity * peak_mm_s` over the first `ramp_fraction` of the event and
//! then holds, scaled by `g^2`. As a rotating vector it reaches the vertical
//! axis 90 degrees after the horizontal one (`psi` is drawn per event):
//!
//! ```text
//! u = severity peak g^2 min(1, (t - t_start) / (ramp_fraction D))
//! v_x += gx u sin(theta_r + psi),  v_y += gy u sin(theta_r + psi - pi/2),  v_z += gz u sin(theta_r + psi)
//! ```
//!
//! **Bearing defect** (a spall on one race or ball of the motor's drive-end
//! bearing): each time a rolling element meets the defect it strikes the
//! housing, which rings at its structural resonance. The strike rate is a
//! bearing defect frequency, from the textbook kinematic formulas for a
//! bearing with `n` balls of diameter `d` on pitch diameter `D` at contact
//! angle `phi`, with a stationary outer race and the inner race turning at
//! `f_r`:
//!
//! ```text
//! BPFO = (n/2) f_r (1 - (d/D) cos phi)          ball pass frequency, outer race
//! BPFI = (n/2) f_r (1 + (d/D) cos phi)          ball pass frequency, inner race
//! BSF  = (D/(2d)) f_r (1 - ((d/D) cos phi)^2)   ball spin frequency
//! FTF  = (f_r/2) (1 - (d/D) cos phi)            fundamental train (cage) frequency
//! ```
//!
//! The invented geometry (`n = 8`, `d = 7.9 mm`, `D = 34.5 mm`, `phi = 0`)
//! gives BPFO = 3.084 x, BPFI = 4.916 x, BSF = 2.069 x, FTF = 0.386 x the
//! shaft speed (74.0, 118.0, 49.7 and 9.25 Hz at 24 Hz). The defect `outer`
//! strikes at BPFO with constant strength (it sits in the load zone);
//! `inner` strikes at BPFI, its strength modulated once per revolution as
//! it passes through the load zone (`0.3 + 0.7 (1 + cos(theta_r + psi)) / 2`);
//! `ball` strikes at `2 BSF` (the ball hits both races per spin), modulated
//! at the cage frequency FTF in the same way. The interval between strikes
//! jitters (rolling elements slip): each interval is `(1 + timing_jitter
//! N(0,1))` defect periods (clamped to 0.5..1.5), each strength is
//! `severity impulse_mm_s (1 + amplitude_jitter N(0,1))` times the
//! modulation. A strike at time `t_k` (between samples; its exact time is
//! interpolated) adds the velocity impulse response of a single-degree-of-
//! freedom oscillator with natural frequency `f_n = housing.resonance_hz`
//! and damping ratio `zeta` (textbook):
//!
//! ```text
//! h(t) = A e^(-zeta w_n t) [ cos(w_d t) - zeta / sqrt(1 - zeta^2) sin(w_d t) ],  t >= t_k
//! w_n = 2 pi f_n,  w_d = w_n sqrt(1 - zeta^2),  t = time since the strike
//! ```
//!
//! scaled per axis by `bearing.axis_gain`. It is computed exactly at the
//! sample times by a complex phasor that is multiplied by `e^((-zeta w_n + i
//! w_d) dt)` each sample, and incremented by `A e^((-zeta w_n + i w_d) delta)`
//! at a strike `delta` seconds before the sample. The demo's resonance, 170 Hz
//! with `zeta = 0.08` (decay time constant 11.7 ms), lies below Nyquist and
//! apart from the blade pass. No strikes are started in the last 5 decay time
//! constants of the event, so the ringing has died down (to `e^-5`) when the
//! event ends.
//!
//! **Mount looseness** (a loose hold-down bolt of the motor foot): the mount's
//! stiffness becomes nonlinear and the foot rattles. Modelled as:
//!
//! 1. a series of sub-harmonics and harmonics at the file's `orders`
//!    (multiples of 0.5x: `0.5x, 1.5x, 2x, ...`) with peak amplitudes
//!    `amplitudes_mm_s` and per-event random phases `phi_k`, on each axis
//!    scaled by `axis_gain`:
//!    `v_a += gain_a severity g^2 sum_k A_k sin(k theta_r + phi_k)`
//!    (half orders use `theta_r` kept modulo `4 pi`, so they are continuous);
//! 2. a larger 1x response (lower stiffness): the normal 1x term is
//!    multiplied by `1 + severity (one_x_gain - 1)`;
//! 3. the foot lands on its base every second revolution (the 0.5x rhythm),
//!    striking the housing resonance as above, with strength `severity
//!    impact_mm_s g^2 (1 + 0.2 N(0,1))`, scaled per axis by `axis_gain`;
//! 4. truncation: the base stops the upward travel, `v_y = min(v_y,
//!    clip_mm_s)` (applied after the noise, before the ADC).
//!
//! **Current surge** (the fan wheel is obstructed, e.g. by a jammed vent
//! flap, or the supply voltage sags): the torque multiplier `M(t)` rises to
//! `1 + severity (torque_factor - 1)` with an overshoot decaying with
//! `overshoot_tau_s`, a first-order rise `rise_s`, a linear release over the
//! last `release_s` of the event, and a once-per-revolution torque ripple
//! (the obstruction rubbing):
//!
//! ```text
//! tau = t - t_start,  D = event duration
//! E(tau) = (1 - e^(-tau / rise_s)) min(1, (D - tau) / release_s)
//! M = 1 + severity E(tau) [ (torque_factor - 1) + overshoot e^(-tau / overshoot_tau_s) ] (1 + ripple sin(theta_r + psi))
//! ```
//!
//! Through `T` the current magnitude rises (3.1 times the nominal current at
//! the demo's `torque_factor = 3.5`) and the slip grows, so the shaft slows
//! by up to `max_slip` and the vibration's frequencies dip with it.
//!
//! # Data sets
//!
//! [`DataSet::Train`] and [`DataSet::Calib`] are normal running only (the
//! file may not schedule faults in them), [`DataSet::Test`] has the fault
//! schedule (and at least an hour of normal running for a false-alarm
//! figure in the demo file), [`DataSet::Sample`] is a short trace with one
//! fault that is shipped in `demo-data/`. Each set has its own seed; the set
//! is `round(duration_s fs)` samples long.
//!
//! # Random streams
//!
//! All randomness is `ChaCha8Rng::seed_from_u64(seed)` with a separate
//! stream (`set_stream`) per purpose: 1 setpoint stages, 2 load, 3 sensor
//! noise, 4 initial angles, `100 + i` the `i`-th event of the set (file
//! order). ChaCha output is value-stable across `rand_chacha` versions;
//! uniform `f64`s are `rand`'s `StandardUniform` (53 bits) and normal draws
//! are Box-Muller pairs from them (`sqrt(-2 ln(1 - u1)) (cos, sin)(2 pi u2)`).

use anyhow::{anyhow, bail, Context, Result};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};
use std::f64::consts::TAU;
use std::path::Path;

/// Longest data set the generator makes, in samples (about 35 hours at
/// 400 Hz): a guard against a typo that would exhaust memory.
pub const MAX_SAMPLES: usize = 50_000_000;

/// Names of the generated columns, in order.
pub const COLUMNS: [&str; 4] = ["vib_x", "vib_y", "vib_z", "current"];

/// The whole scenario file: machine, sensors, faults and data sets.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// A human-readable name of the scenario.
    pub name: String,
    /// Sample rate of every channel, Hz (400 in the demo).
    pub sample_rate_hz: f64,
    /// Drive, setpoint and slip.
    pub drive: Drive,
    /// The load process.
    pub load: Load,
    /// Normal vibration.
    pub vibration: Vibration,
    /// Motor current.
    pub current: Current,
    /// ADC ranges and resolution.
    pub sensors: Sensors,
    /// The housing's structural resonance (rung by bearing and looseness strikes).
    pub housing: Housing,
    /// Imbalance fault parameters.
    pub imbalance: Imbalance,
    /// Bearing geometry and defect fault parameters.
    pub bearing: Bearing,
    /// Mount looseness fault parameters.
    pub looseness: Looseness,
    /// Current surge fault parameters.
    pub current_surge: CurrentSurge,
    /// The data sets: seeds, lengths, fault schedules.
    pub sets: Sets,
}

/// The variable-frequency drive, the speed setpoint and the motor's slip
/// (see the [module docs](self)).
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Drive {
    /// Drive output frequency at setpoint 0, Hz (a 2-pole motor turns at
    /// this many revolutions per second at zero slip).
    pub supply_hz: f64,
    /// Slip at rated torque (`T = 1`), as a fraction.
    pub rated_slip: f64,
    /// Largest slip (the linear slip model's limit), as a fraction.
    pub max_slip: f64,
    /// Setpoint stages are drawn uniformly in `+-setpoint_range` (fraction).
    pub setpoint_range: f64,
    /// Shortest and longest duration of a setpoint stage, seconds.
    pub dwell_s: [f64; 2],
    /// Duration of the linear ramp between stages, seconds.
    pub ramp_s: f64,
}

/// The load factor's Ornstein-Uhlenbeck process.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Load {
    /// Correlation time, seconds.
    pub tau_s: f64,
    /// Stationary standard deviation of the load factor around 1.
    pub sigma: f64,
    /// Smallest load factor.
    pub floor: f64,
}

/// Normal vibration: per-axis `[x, y, z]` amplitudes (peak, mm/s, at
/// nominal speed and load), phases (degrees) and noise.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Vibration {
    /// Number of fan blades (the blade-pass order).
    pub blades: u32,
    /// 1x amplitude per axis, mm/s peak.
    pub one_x_mm_s: [f64; 3],
    /// 1x phase per axis, degrees.
    pub one_x_phase_deg: [f64; 3],
    /// 2x amplitude per axis, mm/s peak.
    pub two_x_mm_s: [f64; 3],
    /// 2x phase per axis, degrees.
    pub two_x_phase_deg: [f64; 3],
    /// Blade-pass amplitude per axis, mm/s peak.
    pub blade_pass_mm_s: [f64; 3],
    /// Blade-pass phase per axis, degrees.
    pub blade_pass_phase_deg: [f64; 3],
    /// White noise standard deviation per axis, mm/s.
    pub noise_mm_s: [f64; 3],
}

/// Motor phase current.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Current {
    /// Magnetizing current, A RMS.
    pub magnetizing_a: f64,
    /// Torque-producing current at rated torque, A RMS.
    pub torque_a: f64,
    /// 5th-harmonic amplitude relative to the fundamental.
    pub fifth_harmonic: f64,
    /// 5th-harmonic phase, degrees.
    pub fifth_phase_deg: f64,
    /// White noise standard deviation, A.
    pub noise_a: f64,
}

/// The ADC every channel passes through.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Sensors {
    /// Vibration full scale (the range is `+-` this), mm/s.
    pub vibration_full_scale_mm_s: f64,
    /// Current full scale (the range is `+-` this), A.
    pub current_full_scale_a: f64,
    /// ADC resolution, bits (8 to 24).
    pub adc_bits: u32,
}

/// The bearing housing's structural resonance.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Housing {
    /// Natural frequency, Hz (below half the sample rate).
    pub resonance_hz: f64,
    /// Damping ratio (0 to 1, exclusive).
    pub damping_ratio: f64,
}

/// Growing imbalance.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Imbalance {
    /// Added 1x amplitude at the end of the ramp (severity 1), mm/s peak.
    pub peak_mm_s: f64,
    /// Fraction of the event over which the amplitude ramps up (0 to 1).
    pub ramp_fraction: f64,
    /// Gain per axis `[x, y, z]`.
    pub axis_gain: [f64; 3],
}

/// Where the bearing's defect is.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Defect {
    /// Outer race: strikes at BPFO, constant strength.
    Outer,
    /// Inner race: strikes at BPFI, modulated once per revolution.
    Inner,
    /// A ball: strikes at 2 BSF, modulated at FTF.
    Ball,
}

/// Bearing geometry and the bearing-defect fault.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Bearing {
    /// Number of balls `n`.
    pub balls: u32,
    /// Ball diameter `d`, mm.
    pub ball_diameter_mm: f64,
    /// Pitch diameter `D`, mm.
    pub pitch_diameter_mm: f64,
    /// Contact angle `phi`, degrees.
    pub contact_angle_deg: f64,
    /// Where the defect is.
    pub defect: Defect,
    /// Strike strength (peak velocity of one strike's ringing), mm/s.
    pub impulse_mm_s: f64,
    /// Relative standard deviation of the strike strength.
    pub amplitude_jitter: f64,
    /// Relative standard deviation of the interval between strikes.
    pub timing_jitter: f64,
    /// Gain per axis `[x, y, z]`.
    pub axis_gain: [f64; 3],
}

/// Bearing defect frequencies as multiples of the shaft frequency (orders).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BearingOrders {
    /// Ball pass frequency, outer race.
    pub bpfo: f64,
    /// Ball pass frequency, inner race.
    pub bpfi: f64,
    /// Ball spin frequency.
    pub bsf: f64,
    /// Fundamental train (cage) frequency.
    pub ftf: f64,
}

impl Bearing {
    /// The defect frequencies per unit shaft frequency, from the kinematic
    /// formulas in the [module docs](self) (multiply by `f_r` for Hz).
    pub fn orders(&self) -> BearingOrders {
        let n = f64::from(self.balls);
        let r = self.ball_diameter_mm / self.pitch_diameter_mm * self.contact_angle_deg.to_radians().cos();
        BearingOrders {
            bpfo: n / 2.0 * (1.0 - r),
            bpfi: n / 2.0 * (1.0 + r),
            bsf: self.pitch_diameter_mm / (2.0 * self.ball_diameter_mm) * (1.0 - r * r),
            ftf: 0.5 * (1.0 - r),
        }
    }

    /// Strikes per shaft revolution for the configured defect (BPFO, BPFI
    /// or 2 BSF).
    pub fn strike_order(&self) -> f64 {
        let o = self.orders();
        match self.defect {
            Defect::Outer => o.bpfo,
            Defect::Inner => o.bpfi,
            Defect::Ball => 2.0 * o.bsf,
        }
    }
}

/// Mount looseness.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Looseness {
    /// Orders of the added sub-harmonics and harmonics (multiples of 0.5).
    pub orders: Vec<f64>,
    /// Their amplitudes, mm/s peak (one per order).
    pub amplitudes_mm_s: Vec<f64>,
    /// Factor on the normal 1x response at severity 1 (at least 1).
    pub one_x_gain: f64,
    /// Strength of the foot's strike every second revolution, mm/s.
    pub impact_mm_s: f64,
    /// Gain per axis `[x, y, z]`.
    pub axis_gain: [f64; 3],
    /// Upper limit of the vertical (`y`) velocity while loose, mm/s.
    pub clip_mm_s: f64,
}

/// Current surge (stall or voltage sag).
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct CurrentSurge {
    /// Torque multiplier on the plateau at severity 1 (at least 1).
    pub torque_factor: f64,
    /// Extra torque multiplier at the onset, decaying.
    pub overshoot: f64,
    /// Decay time constant of the overshoot, seconds.
    pub overshoot_tau_s: f64,
    /// First-order rise time constant, seconds.
    pub rise_s: f64,
    /// Linear release at the end of the event, seconds.
    pub release_s: f64,
    /// Once-per-revolution torque ripple during the surge (fraction).
    pub ripple: f64,
}

/// The four data sets.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Sets {
    /// Training data (normal running only).
    pub train: SetSpec,
    /// Calibration data (normal running only).
    pub calib: SetSpec,
    /// Test data (normal running and the fault schedule).
    pub test: SetSpec,
    /// A short trace with a fault, shipped in `demo-data/`.
    pub sample: SetSpec,
}

/// One data set: seed, length, faults.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct SetSpec {
    /// Seed of every random stream of this set.
    pub seed: u64,
    /// Length, seconds (the set has `round(duration_s * sample_rate_hz)` samples).
    pub duration_s: f64,
    /// Fault schedule (may overlap; none allowed in `train` and `calib`).
    #[serde(default)]
    pub events: Vec<EventSpec>,
}

/// One scheduled fault, in seconds.
#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct EventSpec {
    /// The fault.
    pub kind: FaultKind,
    /// Start, seconds from the start of the set.
    pub start_s: f64,
    /// Duration, seconds.
    pub duration_s: f64,
    /// Multiplier on the fault's amplitudes (default 1).
    #[serde(default = "one")]
    pub severity: f64,
}

fn one() -> f64 {
    1.0
}

/// The kinds of injected faults.
#[derive(Clone, Copy, Debug, Deserialize, Serialize, PartialEq, Eq, Hash, PartialOrd, Ord)]
#[serde(rename_all = "snake_case")]
pub enum FaultKind {
    /// Growing imbalance at 1x.
    Imbalance,
    /// Bearing-defect strikes ringing the housing.
    Bearing,
    /// Mount looseness: sub-harmonics, harmonics, strikes, truncation.
    Looseness,
    /// A surge of motor current (stall or voltage sag).
    CurrentSurge,
}

impl FaultKind {
    /// Every kind, in declaration order.
    pub const ALL: [FaultKind; 4] =
        [FaultKind::Imbalance, FaultKind::Bearing, FaultKind::Looseness, FaultKind::CurrentSurge];

    /// The name used in the scenario file (`imbalance`, `bearing`,
    /// `looseness`, `current_surge`).
    pub fn name(self) -> &'static str {
        match self {
            FaultKind::Imbalance => "imbalance",
            FaultKind::Bearing => "bearing",
            FaultKind::Looseness => "looseness",
            FaultKind::CurrentSurge => "current_surge",
        }
    }
}

/// One fault in a generated set, in samples.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FaultEvent {
    /// The fault.
    pub kind: FaultKind,
    /// First sample of the fault.
    pub start: usize,
    /// One past the last sample of the fault (exclusive).
    pub end: usize,
}

/// The data sets a scenario defines.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum DataSet {
    /// Normal running, for fitting the model.
    Train,
    /// Normal running with another seed, for calibration and thresholds.
    Calib,
    /// Normal running with the fault schedule.
    Test,
    /// A short trace with one fault.
    Sample,
}

impl DataSet {
    /// Every data set.
    pub const ALL: [DataSet; 4] = [DataSet::Train, DataSet::Calib, DataSet::Test, DataSet::Sample];

    /// Its name (`train`, `calib`, `test`, `sample`), as in the file's `[sets.*]`.
    pub fn name(self) -> &'static str {
        match self {
            DataSet::Train => "train",
            DataSet::Calib => "calib",
            DataSet::Test => "test",
            DataSet::Sample => "sample",
        }
    }

    /// The data set of that name, if any.
    pub fn from_name(s: &str) -> Option<DataSet> {
        DataSet::ALL.into_iter().find(|d| d.name() == s)
    }
}

/// A generated data set.
#[derive(Clone, Debug, PartialEq)]
pub struct Generated {
    /// Feature column names: `vib_x, vib_y, vib_z` (mm/s) and `current` (A).
    pub columns: Vec<String>,
    /// One row of four values per sample.
    pub rows: Vec<Vec<f32>>,
    /// Per-sample label: 1 inside a fault event, else 0.
    pub labels: Vec<u8>,
    /// The fault events, sorted by start.
    pub events: Vec<FaultEvent>,
    /// Sample rate, Hz.
    pub sample_rate_hz: f32,
}

impl Scenario {
    /// Reads and checks a scenario file.
    ///
    /// # Errors
    /// An unreadable file, or anything [`Scenario::from_toml_str`] refuses;
    /// messages start with the file name.
    pub fn load(path: &Path) -> Result<Scenario> {
        let text = std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
        Scenario::from_toml_str(&text, &path.display().to_string())
    }

    /// Parses and checks a scenario from TOML text; `source` names it in
    /// errors.
    ///
    /// # Errors
    /// TOML syntax errors, unknown keys, missing keys and wrong types (with
    /// line and column and the offending line), and values the generator
    /// cannot use (named by their key, e.g. `sets.test.events[2]`): negative
    /// or non-finite amplitudes, a frequency at or above half the sample
    /// rate, an event outside its set, faults in `train` or `calib`, a set
    /// longer than [`MAX_SAMPLES`], and so on.
    pub fn from_toml_str(text: &str, source: &str) -> Result<Scenario> {
        let s: Scenario = toml::from_str(text).map_err(|e| anyhow!("{source}: {}", toml_error(text, &e)))?;
        s.check().map_err(|e| anyhow!("{source}: {e}"))?;
        Ok(s)
    }

    /// The spec of one data set.
    pub fn set(&self, set: DataSet) -> &SetSpec {
        match set {
            DataSet::Train => &self.sets.train,
            DataSet::Calib => &self.sets.calib,
            DataSet::Test => &self.sets.test,
            DataSet::Sample => &self.sets.sample,
        }
    }

    /// Number of samples of a data set.
    pub fn samples(&self, set: DataSet) -> usize {
        self.samples_of(self.set(set).duration_s)
    }

    /// Nominal shaft frequency `f_r0 = supply_hz (1 - rated_slip)`, Hz.
    pub fn nominal_shaft_hz(&self) -> f64 {
        self.drive.supply_hz * (1.0 - self.drive.rated_slip)
    }

    fn samples_of(&self, seconds: f64) -> usize {
        // Checked finite and in range by `check`.
        (seconds * self.sample_rate_hz).round() as usize
    }

    /// The events of a set in samples, in file order.
    fn events_of(&self, set: DataSet) -> Vec<(FaultEvent, f64)> {
        self.set(set)
            .events
            .iter()
            .map(|e| {
                let start = self.samples_of(e.start_s);
                let end = self.samples_of(e.start_s + e.duration_s);
                (FaultEvent { kind: e.kind, start, end }, e.severity)
            })
            .collect()
    }

    /// Every semantic check, errors naming the key.
    fn check(&self) -> Result<()> {
        let fs = self.sample_rate_hz;
        pos("sample_rate_hz", fs)?;
        let d = &self.drive;
        pos("drive.supply_hz", d.supply_hz)?;
        within("drive.rated_slip", d.rated_slip, 0.0, 0.5, false)?;
        within("drive.max_slip", d.max_slip, d.rated_slip, 0.5, true)?;
        within("drive.setpoint_range", d.setpoint_range, 0.0, 0.5, true)?;
        pos("drive.dwell_s[0]", d.dwell_s[0])?;
        if !(d.dwell_s[1].is_finite() && d.dwell_s[1] >= d.dwell_s[0]) {
            bail!("`drive.dwell_s`: {} is not at least {}, the shortest dwell", d.dwell_s[1], d.dwell_s[0]);
        }
        nonneg("drive.ramp_s", d.ramp_s)?;
        pos("load.tau_s", self.load.tau_s)?;
        nonneg("load.sigma", self.load.sigma)?;
        within("load.floor", self.load.floor, 0.0, 1.0, false)?;
        let v = &self.vibration;
        if v.blades == 0 {
            bail!("`vibration.blades`: must be at least 1");
        }
        for (key, arr) in [
            ("vibration.one_x_mm_s", v.one_x_mm_s),
            ("vibration.two_x_mm_s", v.two_x_mm_s),
            ("vibration.blade_pass_mm_s", v.blade_pass_mm_s),
            ("vibration.noise_mm_s", v.noise_mm_s),
            ("imbalance.axis_gain", self.imbalance.axis_gain),
            ("bearing.axis_gain", self.bearing.axis_gain),
            ("looseness.axis_gain", self.looseness.axis_gain),
        ] {
            for (i, x) in arr.iter().enumerate() {
                nonneg(&format!("{key}[{i}]"), *x)?;
            }
        }
        for (key, arr) in [
            ("vibration.one_x_phase_deg", v.one_x_phase_deg),
            ("vibration.two_x_phase_deg", v.two_x_phase_deg),
            ("vibration.blade_pass_phase_deg", v.blade_pass_phase_deg),
        ] {
            for (i, x) in arr.iter().enumerate() {
                finite(&format!("{key}[{i}]"), *x)?;
            }
        }
        let c = &self.current;
        nonneg("current.magnetizing_a", c.magnetizing_a)?;
        pos("current.torque_a", c.torque_a)?;
        nonneg("current.fifth_harmonic", c.fifth_harmonic)?;
        finite("current.fifth_phase_deg", c.fifth_phase_deg)?;
        nonneg("current.noise_a", c.noise_a)?;
        pos("sensors.vibration_full_scale_mm_s", self.sensors.vibration_full_scale_mm_s)?;
        pos("sensors.current_full_scale_a", self.sensors.current_full_scale_a)?;
        if !(8..=24).contains(&self.sensors.adc_bits) {
            bail!("`sensors.adc_bits`: {} is outside 8..=24", self.sensors.adc_bits);
        }
        let h = &self.housing;
        within("housing.resonance_hz", h.resonance_hz, 0.0, fs / 2.0, false)?;
        within("housing.damping_ratio", h.damping_ratio, 0.0, 1.0, false)?;
        let im = &self.imbalance;
        nonneg("imbalance.peak_mm_s", im.peak_mm_s)?;
        within("imbalance.ramp_fraction", im.ramp_fraction, 0.0, 1.0, true)?;
        let b = &self.bearing;
        if b.balls < 3 {
            bail!("`bearing.balls`: {} is fewer than 3", b.balls);
        }
        pos("bearing.pitch_diameter_mm", b.pitch_diameter_mm)?;
        within("bearing.ball_diameter_mm", b.ball_diameter_mm, 0.0, b.pitch_diameter_mm, false)?;
        within("bearing.contact_angle_deg", b.contact_angle_deg, 0.0, 60.0, true)?;
        nonneg("bearing.impulse_mm_s", b.impulse_mm_s)?;
        within("bearing.amplitude_jitter", b.amplitude_jitter, 0.0, 1.0, true)?;
        within("bearing.timing_jitter", b.timing_jitter, 0.0, 0.2, true)?;
        let l = &self.looseness;
        if l.orders.len() != l.amplitudes_mm_s.len() {
            bail!(
                "`looseness.amplitudes_mm_s`: {} amplitudes for {} orders (`looseness.orders`)",
                l.amplitudes_mm_s.len(),
                l.orders.len()
            );
        }
        for (i, (&o, &a)) in l.orders.iter().zip(&l.amplitudes_mm_s).enumerate() {
            pos(&format!("looseness.orders[{i}]"), o)?;
            if (o * 2.0).fract() != 0.0 {
                bail!("`looseness.orders[{i}]`: {o} is not a multiple of 0.5");
            }
            nonneg(&format!("looseness.amplitudes_mm_s[{i}]"), a)?;
        }
        if !(l.one_x_gain.is_finite() && l.one_x_gain >= 1.0) {
            bail!("`looseness.one_x_gain`: {} is not a finite number of at least 1", l.one_x_gain);
        }
        nonneg("looseness.impact_mm_s", l.impact_mm_s)?;
        pos("looseness.clip_mm_s", l.clip_mm_s)?;
        let cs = &self.current_surge;
        if !(cs.torque_factor.is_finite() && cs.torque_factor >= 1.0) {
            bail!("`current_surge.torque_factor`: {} is not a finite number of at least 1", cs.torque_factor);
        }
        nonneg("current_surge.overshoot", cs.overshoot)?;
        pos("current_surge.overshoot_tau_s", cs.overshoot_tau_s)?;
        pos("current_surge.rise_s", cs.rise_s)?;
        nonneg("current_surge.release_s", cs.release_s)?;
        within("current_surge.ripple", cs.ripple, 0.0, 1.0, false)?;

        // Nyquist: every periodic component at the fastest shaft speed.
        let nyq = fs / 2.0;
        let fe_max = d.supply_hz * (1.0 + d.setpoint_range);
        let fr_max = fe_max;
        let max_order = l.orders.iter().copied().fold(f64::from(v.blades).max(2.0), f64::max);
        if max_order * fr_max >= nyq {
            bail!(
                "order {max_order} of the shaft speed reaches {:.1} Hz at the fastest setpoint \
                 (`drive.supply_hz` x (1 + `drive.setpoint_range`)), not below half the sample rate ({nyq} Hz): \
                 lower `vibration.blades` or `looseness.orders`, or raise `sample_rate_hz`",
                max_order * fr_max
            );
        }
        if c.fifth_harmonic > 0.0 && 5.0 * fe_max >= nyq {
            bail!(
                "`current.fifth_harmonic`: 5 x {fe_max:.1} Hz is not below half the sample rate ({nyq} Hz); set it to 0"
            );
        }
        if b.strike_order() * fr_max >= nyq {
            bail!(
                "`bearing`: the defect strikes {:.1} times a second at the fastest setpoint, \
                 not below half the sample rate ({nyq} Hz)",
                b.strike_order() * fr_max
            );
        }

        for ds in DataSet::ALL {
            let spec = self.set(ds);
            let key = format!("sets.{}", ds.name());
            pos(&format!("{key}.duration_s"), spec.duration_s)?;
            let n = spec.duration_s * fs;
            if n.round() < 1.0 || n.round() > MAX_SAMPLES as f64 {
                bail!("`{key}.duration_s`: {} s is {n:.0} samples, outside 1..={MAX_SAMPLES}", spec.duration_s);
            }
            if matches!(ds, DataSet::Train | DataSet::Calib) && !spec.events.is_empty() {
                bail!("`{key}.events`: the {} set is normal running only; schedule faults in `test`", ds.name());
            }
            let len = self.samples_of(spec.duration_s);
            for (i, e) in spec.events.iter().enumerate() {
                let ek = format!("{key}.events[{i}]");
                nonneg(&format!("{ek}.start_s"), e.start_s)?;
                pos(&format!("{ek}.duration_s"), e.duration_s)?;
                pos(&format!("{ek}.severity"), e.severity)?;
                let (start, end) = (self.samples_of(e.start_s), self.samples_of(e.start_s + e.duration_s));
                if end <= start {
                    bail!("`{ek}` ({}): {} s is shorter than one sample", e.kind.name(), e.duration_s);
                }
                if end > len {
                    bail!(
                        "`{ek}` ({} at {} s): ends at {} s, after the set ends ({} s)",
                        e.kind.name(),
                        e.start_s,
                        e.start_s + e.duration_s,
                        spec.duration_s
                    );
                }
            }
        }
        Ok(())
    }
}

fn finite(key: &str, x: f64) -> Result<()> {
    if !x.is_finite() {
        bail!("`{key}`: {x} is not a finite number");
    }
    Ok(())
}

fn nonneg(key: &str, x: f64) -> Result<()> {
    if !(x.is_finite() && x >= 0.0) {
        bail!("`{key}`: {x} is not a finite number of at least 0");
    }
    Ok(())
}

fn pos(key: &str, x: f64) -> Result<()> {
    if !(x.is_finite() && x > 0.0) {
        bail!("`{key}`: {x} is not a finite number above 0");
    }
    Ok(())
}

/// `lo < x < hi`, or `lo <= x <= hi` when `inclusive`.
fn within(key: &str, x: f64, lo: f64, hi: f64, inclusive: bool) -> Result<()> {
    let ok = x.is_finite() && if inclusive { lo <= x && x <= hi } else { lo < x && x < hi };
    if !ok {
        let (a, b) = if inclusive { ("[", "]") } else { ("(", ")") };
        bail!("`{key}`: {x} is outside {a}{lo}, {hi}{b}");
    }
    Ok(())
}

/// A TOML error as one line: position, message, and the offending line.
fn toml_error(text: &str, e: &toml::de::Error) -> String {
    let msg = e.message().trim().replace('\n', " ");
    match e.span() {
        Some(span) => {
            let at = span.start.min(text.len());
            let before = &text[..at];
            let line = before.matches('\n').count() + 1;
            let line_start = before.rfind('\n').map_or(0, |i| i + 1);
            let column = before[line_start..].chars().count() + 1;
            let line_text = text[line_start..].lines().next().unwrap_or("").trim();
            // The table the line is in, if any.
            let table = before[..line_start]
                .lines()
                .rev()
                .map(str::trim)
                .find(|l| l.starts_with('['))
                .map(|l| format!(" (in {})", l.split('#').next().unwrap_or(l).trim()))
                .unwrap_or_default();
            format!("line {line}, column {column}{table}: {msg} (at `{line_text}`)")
        }
        None => msg,
    }
}

// ------------------------------------------------------------------ generator

/// Random draws of one stream.
struct Draws {
    rng: ChaCha8Rng,
    spare: Option<f64>,
}

impl Draws {
    fn new(seed: u64, stream: u64) -> Draws {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(stream);
        Draws { rng, spare: None }
    }

    /// `U(0, 1)`, 53 bits.
    fn uniform(&mut self) -> f64 {
        self.rng.random::<f64>()
    }

    /// `N(0, 1)` by Box-Muller (pairs, the second kept for the next call).
    fn normal(&mut self) -> f64 {
        if let Some(z) = self.spare.take() {
            return z;
        }
        let u1 = 1.0 - self.uniform();
        let u2 = self.uniform();
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (TAU * u2).sin_cos();
        self.spare = Some(r * s);
        r * c
    }
}

const STREAM_SETPOINT: u64 = 1;
const STREAM_LOAD: u64 = 2;
const STREAM_NOISE: u64 = 3;
const STREAM_INIT: u64 = 4;
const STREAM_EVENT0: u64 = 100;

/// Speed setpoint stages: `(start time, level)`, the first starting at or
/// before 0.
struct Setpoint {
    stages: Vec<(f64, f64)>,
    ramp_s: f64,
    at: usize,
}

impl Setpoint {
    fn new(d: &Drive, duration_s: f64, draws: &mut Draws) -> Setpoint {
        let level = |draws: &mut Draws| d.setpoint_range * (2.0 * draws.uniform() - 1.0);
        let dwell = |draws: &mut Draws| d.dwell_s[0] + (d.dwell_s[1] - d.dwell_s[0]) * draws.uniform();
        let first = level(draws);
        // The first stage began a random part of a dwell before the set.
        let mut t = -dwell(draws) * draws.uniform();
        let mut stages = vec![(t, first)];
        while t <= duration_s {
            t += dwell(draws);
            stages.push((t, level(draws)));
        }
        Setpoint { stages, ramp_s: d.ramp_s, at: 0 }
    }

    /// `u(t)`; `t` never decreases between calls.
    fn level(&mut self, t: f64) -> f64 {
        while self.at + 1 < self.stages.len() && self.stages[self.at + 1].0 <= t {
            self.at += 1;
        }
        let (t0, to) = self.stages[self.at];
        let from = if self.at == 0 { to } else { self.stages[self.at - 1].1 };
        if self.ramp_s <= 0.0 {
            return to;
        }
        from + (to - from) * ((t - t0) / self.ramp_s).min(1.0)
    }
}

/// The housing resonance as a complex phasor (see the module docs).
#[derive(Clone, Copy)]
struct Resonator {
    re: f64,
    im: f64,
    step_re: f64,
    step_im: f64,
    alpha: f64,
    omega: f64,
    k: f64,
}

impl Resonator {
    fn new(h: &Housing, dt: f64) -> Resonator {
        let wn = TAU * h.resonance_hz;
        let z = h.damping_ratio;
        let alpha = z * wn;
        let omega = wn * (1.0 - z * z).sqrt();
        let decay = (-alpha * dt).exp();
        let (s, c) = (omega * dt).sin_cos();
        Resonator {
            re: 0.0,
            im: 0.0,
            step_re: decay * c,
            step_im: decay * s,
            alpha,
            omega,
            k: z / (1.0 - z * z).sqrt(),
        }
    }

    /// One sample later.
    fn advance(&mut self) {
        let (re, im) = (self.re, self.im);
        self.re = re * self.step_re - im * self.step_im;
        self.im = re * self.step_im + im * self.step_re;
    }

    /// A strike of strength `amp` that happened `delay` seconds ago.
    fn strike(&mut self, amp: f64, delay: f64) {
        let d = amp * (-self.alpha * delay).exp();
        let (s, c) = (self.omega * delay).sin_cos();
        self.re += d * c;
        self.im += d * s;
    }

    /// The velocity response now.
    fn velocity(&self) -> f64 {
        self.re - self.k * self.im
    }
}

/// Per-event state.
enum State {
    Imbalance {
        psi: f64,
    },
    Bearing {
        res: Resonator,
        /// Defect cycles since the event started.
        cycles: f64,
        /// Cycle count of the next strike.
        next: f64,
        /// Cage angle (cycles) for the ball defect's modulation.
        cage: f64,
        psi: f64,
        /// No strikes start at or after this sample.
        last_strike: usize,
        draws: Draws,
    },
    Looseness {
        res: Resonator,
        /// Half-revolution counter (the 0.5x rhythm), strikes at integers.
        half: f64,
        /// Per-order phases.
        phases: Vec<f64>,
        draws: Draws,
    },
    Surge {
        psi: f64,
    },
}

struct Active {
    ev: FaultEvent,
    severity: f64,
    state: State,
}

/// The ADC of the module docs.
fn adc(v: f64, full_scale: f64, bits: u32) -> f32 {
    let half = f64::from(1u32 << (bits - 1));
    let lsb = full_scale / half;
    let k = (v / lsb).round().clamp(-half, half - 1.0);
    (k * lsb) as f32
}

/// Generates one data set of a scenario (see the [module docs](self) for
/// the model). Deterministic: the same scenario and set give the same
/// values on every run.
///
/// # Errors
/// None for a scenario that passed [`Scenario::load`] /
/// [`Scenario::from_toml_str`]; a hand-built one is checked first and its
/// problems are returned as by those.
pub fn generate(s: &Scenario, set: DataSet) -> Result<Generated> {
    s.check().context("the scenario is not valid")?;
    let spec = s.set(set);
    let fs = s.sample_rate_hz;
    let dt = 1.0 / fs;
    let len = s.samples(set);
    let seed = spec.seed;

    let mut setpoint = Setpoint::new(&s.drive, len as f64 * dt, &mut Draws::new(seed, STREAM_SETPOINT));
    let mut load_draws = Draws::new(seed, STREAM_LOAD);
    let mut noise = Draws::new(seed, STREAM_NOISE);
    let mut init = Draws::new(seed, STREAM_INIT);
    // Shaft revolutions modulo 2 (so half orders are continuous) and
    // electrical cycles modulo 1.
    let mut rev = 2.0 * init.uniform();
    let mut elec = init.uniform();
    let load_a = (-dt / s.load.tau_s).exp();
    let load_b = s.load.sigma * (1.0 - load_a * load_a).sqrt();
    let mut l = s.load.sigma * load_draws.normal();

    let v = &s.vibration;
    let deg = |x: f64| x.to_radians();
    // A sin(x + phi) = (A cos phi) sin x + (A sin phi) cos x.
    let split = |a: [f64; 3], p: [f64; 3]| -> [(f64, f64); 3] {
        std::array::from_fn(|i| (a[i] * deg(p[i]).cos(), a[i] * deg(p[i]).sin()))
    };
    let one_x = split(v.one_x_mm_s, v.one_x_phase_deg);
    let two_x = split(v.two_x_mm_s, v.two_x_phase_deg);
    let bpf = split(v.blade_pass_mm_s, v.blade_pass_phase_deg);
    let blades = f64::from(v.blades);
    let fr0 = s.nominal_shaft_hz();
    let cur = &s.current;
    let phi5 = deg(cur.fifth_phase_deg);
    let strike_order = s.bearing.strike_order();
    let ftf_order = s.bearing.orders().ftf;
    let res0 = Resonator::new(&s.housing, dt);
    let decay_samples = (5.0 / res0.alpha * fs).ceil() as usize;

    let mut active: Vec<Active> = s
        .events_of(set)
        .into_iter()
        .enumerate()
        .map(|(i, (ev, severity))| {
            let mut draws = Draws::new(seed, STREAM_EVENT0 + i as u64);
            let psi = TAU * draws.uniform();
            let state = match ev.kind {
                FaultKind::Imbalance => State::Imbalance { psi },
                FaultKind::Bearing => {
                    let next = draws.uniform();
                    State::Bearing {
                        res: res0,
                        cycles: 0.0,
                        next,
                        cage: 0.0,
                        psi,
                        last_strike: ev.end.saturating_sub(decay_samples),
                        draws,
                    }
                }
                FaultKind::Looseness => {
                    let phases = s.looseness.orders.iter().map(|_| TAU * draws.uniform()).collect();
                    State::Looseness { res: res0, half: -draws.uniform(), phases, draws }
                }
                FaultKind::CurrentSurge => State::Surge { psi },
            };
            Active { ev, severity, state }
        })
        .collect();
    let mut events: Vec<FaultEvent> = active.iter().map(|a| a.ev).collect();
    events.sort_by_key(|e| (e.start, e.end));

    let mut rows = Vec::with_capacity(len);
    let mut labels = Vec::with_capacity(len);
    let (vfs, cfs, bits) = (s.sensors.vibration_full_scale_mm_s, s.sensors.current_full_scale_a, s.sensors.adc_bits);
    let surge = &s.current_surge;
    let imb = &s.imbalance;
    let loose = &s.looseness;
    let brg = &s.bearing;

    for n in 0..len {
        let t = n as f64 * dt;
        let fe = s.drive.supply_hz * (1.0 + setpoint.level(t));
        let load = (1.0 + l).max(s.load.floor);
        let theta = TAU * rev;
        let (s1, c1) = theta.sin_cos();

        // Torque multiplier of any surge in progress.
        let mut m = 1.0;
        for a in &active {
            if let State::Surge { psi } = a.state {
                if (a.ev.start..a.ev.end).contains(&n) {
                    let tau = (n - a.ev.start) as f64 * dt;
                    let dur = (a.ev.end - a.ev.start) as f64 * dt;
                    let release = if surge.release_s > 0.0 { ((dur - tau) / surge.release_s).min(1.0) } else { 1.0 };
                    let e = (1.0 - (-tau / surge.rise_s).exp()) * release;
                    let lift = (surge.torque_factor - 1.0) + surge.overshoot * (-tau / surge.overshoot_tau_s).exp();
                    m *= 1.0 + a.severity * e * lift * (1.0 + surge.ripple * (theta + psi).sin());
                }
            }
        }
        let ratio = fe / s.drive.supply_hz;
        let torque = load * m * ratio * ratio;
        let slip = (s.drive.rated_slip * torque).min(s.drive.max_slip);
        let fr = fe * (1.0 - slip);
        let g = fr / fr0;
        let g2 = g * g;

        // Normal vibration.
        let (s2, c2) = (2.0 * s1 * c1, c1 * c1 - s1 * s1);
        let (sb, cb) = (blades * theta).sin_cos();
        let one: [f64; 3] = std::array::from_fn(|i| one_x[i].0 * s1 + one_x[i].1 * c1);
        let mut vib: [f64; 3] = std::array::from_fn(|i| {
            g2 * (one[i] + two_x[i].0 * s2 + two_x[i].1 * c2) + g2 * load * (bpf[i].0 * sb + bpf[i].1 * cb)
        });

        // Faults.
        let mut label = 0u8;
        let mut clip: Option<f64> = None;
        for a in &mut active {
            if !(a.ev.start..a.ev.end).contains(&n) {
                continue;
            }
            label = 1;
            let sev = a.severity;
            match &mut a.state {
                State::Imbalance { psi } => {
                    let dur = (a.ev.end - a.ev.start) as f64;
                    let ramp = imb.ramp_fraction * dur;
                    let k = (n - a.ev.start) as f64;
                    let grow = if ramp > 0.0 { (k / ramp).min(1.0) } else { 1.0 };
                    let u = sev * imb.peak_mm_s * g2 * grow;
                    let (si, ci) = (theta + *psi).sin_cos();
                    vib[0] += imb.axis_gain[0] * u * si;
                    vib[1] -= imb.axis_gain[1] * u * ci;
                    vib[2] += imb.axis_gain[2] * u * si;
                }
                State::Bearing { res, .. } => {
                    let r = res.velocity();
                    for (x, gain) in vib.iter_mut().zip(brg.axis_gain) {
                        *x += gain * r;
                    }
                }
                State::Looseness { res, phases, .. } => {
                    let r = res.velocity();
                    let mut harm = 0.0;
                    for ((o, amp), ph) in loose.orders.iter().zip(&loose.amplitudes_mm_s).zip(phases.iter()) {
                        harm += amp * (TAU * o * rev + ph).sin();
                    }
                    let extra_1x = sev * (loose.one_x_gain - 1.0);
                    for i in 0..3 {
                        vib[i] += g2 * (extra_1x * one[i] + loose.axis_gain[i] * sev * harm) + loose.axis_gain[i] * r;
                    }
                    clip = Some(loose.clip_mm_s);
                }
                State::Surge { .. } => {}
            }
        }

        for (x, sigma) in vib.iter_mut().zip(v.noise_mm_s) {
            *x += sigma * noise.normal();
        }
        if let Some(c) = clip {
            vib[1] = vib[1].min(c);
        }

        let t_rel = torque * cur.torque_a;
        let amp = std::f64::consts::SQRT_2 * (cur.magnetizing_a * cur.magnetizing_a + t_rel * t_rel).sqrt();
        let te = TAU * elec;
        let i_now = amp * (te.sin() + cur.fifth_harmonic * (5.0 * te + phi5).sin()) + cur.noise_a * noise.normal();

        rows.push(vec![adc(vib[0], vfs, bits), adc(vib[1], vfs, bits), adc(vib[2], vfs, bits), adc(i_now, cfs, bits)]);
        labels.push(label);

        // Advance to the next sample: angles, load, and the strikes that
        // happen before it.
        let next_rev = rev + fr * dt;
        for a in &mut active {
            if !(a.ev.start..a.ev.end).contains(&n) {
                continue;
            }
            let sev = a.severity;
            match &mut a.state {
                State::Bearing { res, cycles, next, cage, psi, last_strike, draws } => {
                    res.advance();
                    let fd = strike_order * fr;
                    *cycles += fd * dt;
                    *cage += ftf_order * fr * dt;
                    while *next <= *cycles {
                        let delay = (*cycles - *next) / fd;
                        let zone = |x: f64| 0.3 + 0.7 * 0.5 * (1.0 + x.cos());
                        let modulation = match brg.defect {
                            Defect::Outer => 1.0,
                            Defect::Inner => zone(TAU * next_rev + *psi),
                            Defect::Ball => zone(TAU * *cage + *psi),
                        };
                        let strength = sev * brg.impulse_mm_s * (1.0 + brg.amplitude_jitter * draws.normal());
                        let interval = (1.0 + brg.timing_jitter * draws.normal()).clamp(0.5, 1.5);
                        if n + 1 < *last_strike {
                            res.strike(strength * modulation, delay);
                        }
                        *next += interval;
                    }
                }
                State::Looseness { res, half, draws, .. } => {
                    res.advance();
                    let old = half.floor();
                    *half += 0.5 * fr * dt;
                    if half.floor() > old {
                        let delay = (*half - half.floor()) / (0.5 * fr);
                        let strength = sev * loose.impact_mm_s * (1.0 + 0.2 * draws.normal());
                        res.strike(strength * g2, delay);
                    }
                }
                State::Imbalance { .. } | State::Surge { .. } => {}
            }
        }
        rev = next_rev % 2.0;
        elec = (elec + fe * dt) % 1.0;
        l = load_a * l + load_b * load_draws.normal();
    }

    Ok(Generated {
        columns: COLUMNS.iter().map(|c| (*c).to_string()).collect(),
        rows,
        labels,
        events,
        sample_rate_hz: fs as f32,
    })
}

/// Writes a generated set by the path's extension (case-insensitive),
/// atomically (see [`crate::output`]):
/// - `.csv`: a header of the feature columns then `label`, one row per
///   sample (values as [`crate::data::write_csv`] writes them, labels `0`
///   or `1`), which [`crate::data::read`] reads back with its labels;
/// - `.npy`: one `float32` array of shape `[T, 4]`, C order, without labels
///   (and nothing else is written beside it).
///
/// # Errors
/// Another extension, a set whose rows, labels and columns disagree, or an
/// I/O error (nothing is left behind then).
pub fn write(g: &Generated, path: &Path) -> Result<()> {
    let name = path.display();
    let width = g.columns.len();
    if g.rows.len() != g.labels.len() {
        bail!("cannot write {name}: {} rows but {} labels", g.rows.len(), g.labels.len());
    }
    if let Some(i) = g.rows.iter().position(|r| r.len() != width) {
        bail!("cannot write {name}: row {i} has {} values for {width} columns", g.rows[i].len());
    }
    let ext = path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase);
    match ext.as_deref() {
        Some("csv") => {
            let mut header = g.columns.clone();
            header.push("label".to_string());
            crate::data::write_csv_streaming(path, &header, |sink| {
                let mut row = Vec::with_capacity(width + 1);
                for (r, &label) in g.rows.iter().zip(&g.labels) {
                    row.clear();
                    row.extend_from_slice(r);
                    row.push(f32::from(label));
                    sink.push(&row)?;
                }
                Ok(())
            })?;
            Ok(())
        }
        Some("npy") => crate::output::write_atomic_with(path, |file| {
            use npyz::WriterBuilder;
            use std::io::Write;
            let mut buf = std::io::BufWriter::new(file);
            let mut w = npyz::WriteOptions::<f32>::new()
                .default_dtype()
                .shape(&[g.rows.len() as u64, width as u64])
                .writer(&mut buf)
                .begin_nd()
                .with_context(|| format!("cannot write {name}"))?;
            for r in &g.rows {
                w.extend(r.iter().copied()).with_context(|| format!("cannot write {name}"))?;
            }
            w.finish().with_context(|| format!("cannot write {name}"))?;
            buf.flush().with_context(|| format!("cannot write {name}"))?;
            Ok(())
        }),
        _ => bail!(
            "cannot write {name}: unsupported file type (accepted: .csv, with a label column; \
             .npy, float32 [T, {width}] without labels)"
        ),
    }
}

/// FNV-1a 64-bit hash of a generated set's content, for pinning outputs in
/// tests: offset basis `0xcbf29ce484222325`, prime `0x100000001b3`, over
/// the bytes of every value's `f32::to_bits()` in little-endian order, row
/// by row, followed by every label byte in order. Column names, events and
/// the sample rate are not hashed (the labels follow from the events).
pub fn content_hash(g: &Generated) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |b: u8| {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    };
    for r in &g.rows {
        for v in r {
            for b in v.to_bits().to_le_bytes() {
                eat(b);
            }
        }
    }
    for &l in &g.labels {
        eat(l);
    }
    h
}

/// RMS of a slice (0 for an empty one).
fn rms(x: impl Iterator<Item = f64>) -> f64 {
    let (mut s, mut n) = (0.0, 0usize);
    for v in x {
        s += v * v;
        n += 1;
    }
    if n == 0 {
        0.0
    } else {
        (s / n as f64).sqrt()
    }
}

/// How much a fault stands out, per feature: the RMS of the sample-to-
/// sample change (`x[t] - x[t-1]`, the residual of the persistence
/// predictor) over the event, divided by its RMS over the set's normal
/// (label 0) samples. The first sample of every stretch is skipped. A rough
/// stand-in for a next-step predictor's residual.
pub fn change_contrast(g: &Generated, ev: &FaultEvent) -> Vec<f64> {
    let width = g.columns.len();
    (0..width)
        .map(|j| {
            let d = |t: usize| f64::from(g.rows[t][j]) - f64::from(g.rows[t - 1][j]);
            let normal = rms((1..g.rows.len()).filter(|&t| g.labels[t] == 0 && g.labels[t - 1] == 0).map(d));
            let fault = rms((ev.start.max(1) + 1..ev.end).map(d));
            if normal > 0.0 {
                fault / normal
            } else {
                f64::INFINITY
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const DEMO: &str = include_str!("../../demo-data/scenario.toml");

    fn demo() -> Scenario {
        Scenario::from_toml_str(DEMO, "scenario.toml").unwrap()
    }

    /// The demo scenario shortened: a test set of 60 s with one event of
    /// each kind.
    fn small() -> Scenario {
        let mut s = demo();
        s.sets.test.duration_s = 60.0;
        let ev = |kind, start_s, duration_s| EventSpec { kind, start_s, duration_s, severity: 1.0 };
        s.sets.test.events = vec![
            ev(FaultKind::Imbalance, 5.0, 10.0),
            ev(FaultKind::Bearing, 20.0, 5.0),
            ev(FaultKind::Looseness, 30.0, 8.0),
            ev(FaultKind::CurrentSurge, 45.0, 3.0),
        ];
        s
    }

    fn err(text: &str) -> String {
        format!("{:#}", Scenario::from_toml_str(text, "s.toml").unwrap_err())
    }

    #[test]
    fn demo_file_round_trips_through_serde() {
        let s = demo();
        let text = toml::to_string(&s).unwrap();
        assert_eq!(Scenario::from_toml_str(&text, "again").unwrap(), s);
    }

    #[test]
    fn set_names() {
        for d in DataSet::ALL {
            assert_eq!(DataSet::from_name(d.name()), Some(d));
        }
        assert_eq!(DataSet::from_name("validation"), None);
        let names: Vec<_> = FaultKind::ALL.iter().map(|k| k.name()).collect();
        assert_eq!(names, ["imbalance", "bearing", "looseness", "current_surge"]);
    }

    #[test]
    fn bearing_orders_follow_the_textbook_formulas() {
        let b = demo().bearing;
        let o = b.orders();
        // n = 8, d/D = 7.9/34.5, phi = 0, computed by hand.
        let r = 7.9 / 34.5;
        assert!((o.bpfo - 4.0 * (1.0 - r)).abs() < 1e-12);
        assert!((o.bpfi - 4.0 * (1.0 + r)).abs() < 1e-12);
        assert!((o.bsf - 34.5 / 15.8 * (1.0 - r * r)).abs() < 1e-12);
        assert!((o.ftf - 0.5 * (1.0 - r)).abs() < 1e-12);
        // Known identity: BPFO + BPFI = n.
        assert!((o.bpfo + o.bpfi - 8.0).abs() < 1e-12);
        assert!((o.bpfo - 3.0841).abs() < 1e-4 && (o.bpfi - 4.9159).abs() < 1e-4);
        let mut inner = b.clone();
        inner.defect = Defect::Inner;
        assert_eq!(inner.strike_order(), o.bpfi);
        inner.defect = Defect::Ball;
        assert_eq!(inner.strike_order(), 2.0 * o.bsf);
    }

    #[test]
    fn resonator_matches_the_closed_form() {
        let h = Housing { resonance_hz: 170.0, damping_ratio: 0.08 };
        let dt = 1.0 / 400.0;
        let mut r = Resonator::new(&h, dt);
        let delay = 0.3 * dt;
        r.strike(2.0, delay);
        let wn = TAU * 170.0;
        let wd = wn * (1.0f64 - 0.0064).sqrt();
        for n in 0..40 {
            let t = n as f64 * dt + delay;
            let want =
                2.0 * (-0.08 * wn * t).exp() * ((wd * t).cos() - 0.08 / (1.0f64 - 0.0064).sqrt() * (wd * t).sin());
            assert!((r.velocity() - want).abs() < 1e-12, "sample {n}: {} vs {want}", r.velocity());
            r.advance();
        }
    }

    #[test]
    fn adc_rounds_to_the_grid_and_saturates() {
        assert_eq!(adc(1.0 / 1024.0 * 3.4, 32.0, 16), 3.0 / 1024.0);
        assert_eq!(adc(-0.5 / 1024.0 * 1.01, 32.0, 16), -1.0 / 1024.0);
        assert_eq!(adc(100.0, 32.0, 16), 32.0 - 1.0 / 1024.0);
        assert_eq!(adc(-100.0, 32.0, 16), -32.0);
    }

    #[test]
    fn generation_is_deterministic_and_labels_follow_events() {
        let s = small();
        let a = generate(&s, DataSet::Test).unwrap();
        let b = generate(&s, DataSet::Test).unwrap();
        assert_eq!(content_hash(&a), content_hash(&b));
        assert_eq!(a, b);
        assert_eq!(a.rows.len(), 24_000);
        assert_eq!(a.columns, COLUMNS);
        assert_eq!(a.events.len(), 4);
        assert_eq!(a.events[0], FaultEvent { kind: FaultKind::Imbalance, start: 2_000, end: 6_000 });
        for (t, &l) in a.labels.iter().enumerate() {
            let inside = a.events.iter().any(|e| (e.start..e.end).contains(&t));
            assert_eq!(l == 1, inside, "sample {t}");
        }
        // Another seed gives other data.
        let mut other = s.clone();
        other.sets.test.seed += 1;
        assert_ne!(content_hash(&generate(&other, DataSet::Test).unwrap()), content_hash(&a));
    }

    #[test]
    fn faults_leave_the_signal_before_them_alone() {
        let s = small();
        let with = generate(&s, DataSet::Test).unwrap();
        let mut quiet = s.clone();
        quiet.sets.test.events.clear();
        let without = generate(&quiet, DataSet::Test).unwrap();
        let first = with.events[0].start;
        assert_eq!(with.rows[..first], without.rows[..first]);
        assert_ne!(with.rows[first..], without.rows[first..]);
        assert!(without.labels.iter().all(|&l| l == 0));
        // The noise streams do not depend on the events: between the
        // imbalance and the bearing event (no speed change in between)
        // the signals agree.
        let (a, b) = (with.events[0].end, with.events[1].start);
        assert_eq!(with.rows[a..b], without.rows[a..b]);
    }

    #[test]
    fn every_fault_stands_out() {
        let g = generate(&small(), DataSet::Test).unwrap();
        for ev in &g.events {
            let c = change_contrast(&g, ev);
            // Level: RMS over the event against RMS over normal samples.
            let level: Vec<f64> = (0..4)
                .map(|j| {
                    let col = |t: usize| f64::from(g.rows[t][j]);
                    rms((ev.start..ev.end).map(col)) / rms((0..g.rows.len()).filter(|&t| g.labels[t] == 0).map(col))
                })
                .collect();
            let best = c.iter().chain(&level).copied().fold(0.0, f64::max);
            println!("{:>13}: change {c:.2?}, level {level:.2?}", ev.kind.name());
            assert!(best >= 2.5, "{} stands out only {best:.2}x", ev.kind.name());
        }
    }

    #[test]
    fn values_are_in_physical_ranges() {
        let g = generate(&demo(), DataSet::Sample).unwrap();
        let normal: Vec<&Vec<f32>> = g.rows.iter().zip(&g.labels).filter(|(_, &l)| l == 0).map(|(r, _)| r).collect();
        for j in 0..4 {
            let r = rms(normal.iter().map(|row| f64::from(row[j])));
            let want = if j < 3 { 0.2..2.0 } else { 1.8..2.8 };
            assert!(want.contains(&r), "{}: normal RMS {r}", COLUMNS[j]);
        }
        // Every value is on the ADC grid.
        for row in &g.rows {
            assert!(row[..3].iter().all(|v| (v * 1024.0).fract() == 0.0));
            assert_eq!((row[3] * 2048.0).fract(), 0.0);
        }
    }

    #[test]
    fn csv_and_npy_read_back() {
        let mut s = small();
        s.sets.sample.duration_s = 2.0;
        s.sets.sample.events =
            vec![EventSpec { kind: FaultKind::Bearing, start_s: 1.0, duration_s: 0.5, severity: 1.0 }];
        let g = generate(&s, DataSet::Sample).unwrap();
        let dir = tempfile::tempdir().unwrap();
        let csv = dir.path().join("s.csv");
        write(&g, &csv).unwrap();
        let back = crate::data::read(&csv, false).unwrap();
        assert_eq!(back.columns, COLUMNS);
        assert_eq!(back.rows, g.rows);
        assert_eq!(back.labels.as_deref(), Some(&g.labels[..]));
        let npy = dir.path().join("s.NPY");
        write(&g, &npy).unwrap();
        let back = crate::data::read(&npy, false).unwrap();
        assert_eq!(back.rows, g.rows);
        assert_eq!(back.labels, None);
        let e = format!("{:#}", write(&g, &dir.path().join("s.txt")).unwrap_err());
        assert!(e.contains("s.txt") && e.contains("unsupported"), "{e}");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 2);
    }

    #[test]
    fn errors_name_the_key() {
        let e = err(&DEMO.replace("[drive]", "[drive]\nturbo = true"));
        println!("{e}");
        assert!(e.contains("s.toml") && e.contains("unknown field `turbo`") && e.contains("line"), "{e}");
        let e = err(&DEMO.replace("impulse_mm_s = ", "impulse_mm_s = \"loud\" #"));
        println!("{e}");
        assert!(e.contains("s.toml") && e.contains("impulse_mm_s") && e.contains("invalid type"), "{e}");
        let e = err(&DEMO.replace("balls = ", "marbles = "));
        println!("{e}");
        assert!(e.contains("balls"), "{e}");
        let e = err(&DEMO.replace("ramp_s = 8.0", ""));
        println!("{e}");
        assert!(e.contains("s.toml") && e.contains("missing field `ramp_s`") && e.contains("drive"), "{e}");
        let e = err(&DEMO.replace("resonance_hz = 170.0", "resonance_hz = 230.0"));
        assert!(e.contains("`housing.resonance_hz`") && e.contains("230"), "{e}");
        let e = err(&DEMO.replace("blades = 6", "blades = 9"));
        assert!(e.contains("vibration.blades") && e.contains("half the sample rate"), "{e}");
        let e = err(&DEMO.replace("kind = \"imbalance\", start_s = 300.0", "kind = \"imbalance\", start_s = 4190.0"));
        assert!(e.contains("`sets.test.events[0]`") && e.contains("after the set ends"), "{e}");
        let e = err(&DEMO.replace("kind = \"bearing\", start_s = 720.0", "kind = \"wobble\", start_s = 720.0"));
        assert!(e.contains("unknown variant `wobble`"), "{e}");
        let mut s = demo();
        s.sets.train.events = s.sets.sample.events.clone();
        let e = format!("{:#}", generate(&s, DataSet::Train).unwrap_err());
        assert!(e.contains("`sets.train.events`") && e.contains("normal running only"), "{e}");
        let e = format!("{:#}", Scenario::load(Path::new("/nonexistent/scenario.toml")).unwrap_err());
        assert!(e.contains("/nonexistent/scenario.toml"), "{e}");
    }
}
