//! Limited-memory BFGS for smooth unconstrained minimisation (Nocedal 1980; Liu & Nocedal
//! 1989): the two-loop recursion of Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006,
//! Algorithm 7.4, with the bracketing line search of their Algorithms 3.5 and 3.6.
//!
//! Steps are accepted on the strong Wolfe conditions or, once the objective's rounding hides
//! the decrease they ask for, on Hager & Zhang's approximate Wolfe conditions ("A new
//! conjugate gradient method with guaranteed descent and an efficient line search", SIAM J.
//! Optim. 16, 2005), which read the decrease from the slope, computed to full relative
//! precision. The bracket is narrowed by the slope's sign for the same reason. So the
//! iterates keep approaching the minimum until the gradient itself is at rounding level, and
//! the only stopping rule is the gradient's (scipy's `gtol`, largest component at most the
//! tolerance); scipy's objective-change rule, which stops well before that, is not used.
//! Everything is sequential and deterministic: the same objective gives the same iterates.

use std::collections::VecDeque;

/// Correction pairs kept (scipy's `maxcor` default).
const MEMORY: usize = 10;
/// Sufficient-decrease and curvature constants of the strong Wolfe conditions (the usual
/// quasi-Newton choice, Nocedal & Wright section 3.1).
const SUFFICIENT_DECREASE: f64 = 1e-4;
const CURVATURE: f64 = 0.9;
/// Objective evaluations one line search may spend (scikit-learn passes `maxls=50`).
const MAX_LINE_SEARCH_EVALUATIONS: usize = 50;
/// How far above the start value, relative to it, a trial may lie and still count as "not
/// higher" in the approximate Wolfe test: a generous bound on the rounding of an objective
/// summed in f64 over many terms (Hager & Zhang allow 1e-6).
const ROUNDING_ALLOWANCE: f64 = 1e-10;

/// Why a minimisation stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Termination {
    /// Every gradient component is within the tolerance.
    GradientTolerance,
    /// No step along the quasi-Newton direction, nor along the steepest descent, satisfied the
    /// line search: the gradient is at the level of its own rounding (a tolerance below what
    /// the arithmetic can reach) or the objective is not smooth.
    LineSearchStalled,
    /// `max_iterations` ran out first.
    IterationLimit,
}

impl Termination {
    /// Whether the gradient tolerance was met.
    pub fn converged(self) -> bool {
        self == Self::GradientTolerance
    }
}

/// Settings for [`minimise`].
#[derive(Debug, Clone, Copy)]
pub(crate) struct LbfgsSettings {
    pub gradient_tolerance: f64,
    pub max_iterations: usize,
}

/// Outcome of [`minimise`].
#[derive(Debug, Clone)]
pub(crate) struct Minimum {
    pub point: Vec<f64>,
    pub value: f64,
    pub max_abs_gradient: f64,
    pub iterations: usize,
    pub termination: Termination,
}

/// A point with its objective value and gradient.
#[derive(Debug, Clone)]
struct Evaluated {
    point: Vec<f64>,
    value: f64,
    gradient: Vec<f64>,
}

/// `objective(x, gradient)` returns f(x) and writes ∇f(x) into `gradient`.
pub(crate) fn minimise<F>(mut objective: F, start: Vec<f64>, settings: LbfgsSettings) -> Minimum
where
    F: FnMut(&[f64], &mut [f64]) -> f64,
{
    let mut current = evaluate(&mut objective, start);
    let mut corrections: VecDeque<Correction> = VecDeque::with_capacity(MEMORY);
    let mut iterations = 0;
    let termination = loop {
        if max_abs(&current.gradient) <= settings.gradient_tolerance {
            break Termination::GradientTolerance;
        }
        if iterations == settings.max_iterations {
            break Termination::IterationLimit;
        }
        let direction = quasi_newton_direction(&current.gradient, &corrections);
        // The first step along a raw steepest-descent direction has no curvature estimate to
        // scale it; a unit-length move is the usual guess.
        let initial_step = if corrections.is_empty() {
            1.0_f64.min(1.0 / norm(&current.gradient))
        } else {
            1.0
        };
        let Some(next) = line_search(&mut objective, &current, &direction, initial_step) else {
            if corrections.is_empty() {
                break Termination::LineSearchStalled;
            }
            // Stale curvature pairs can produce a poor direction: restart from steepest
            // descent once, as L-BFGS-B does, before giving up.
            corrections.clear();
            continue;
        };
        iterations += 1;
        let step: Vec<f64> = sub(&next.point, &current.point);
        let gradient_change: Vec<f64> = sub(&next.gradient, &current.gradient);
        let curvature = dot(&step, &gradient_change);
        // Keep the pair only if it has positive curvature (always true for a strictly convex
        // objective, up to rounding), so the implicit inverse Hessian stays positive definite.
        if curvature > f64::EPSILON * dot(&gradient_change, &gradient_change) {
            if corrections.len() == MEMORY {
                corrections.pop_front();
            }
            corrections.push_back(Correction {
                step,
                gradient_change,
                inverse_curvature: 1.0 / curvature,
            });
        }
        current = next;
    };
    Minimum {
        max_abs_gradient: max_abs(&current.gradient),
        point: current.point,
        value: current.value,
        iterations,
        termination,
    }
}

/// One stored step `s = x_{k+1} - x_k` with `y = ∇f_{k+1} - ∇f_k` and `1 / (s · y)`.
#[derive(Debug, Clone)]
struct Correction {
    step: Vec<f64>,
    gradient_change: Vec<f64>,
    inverse_curvature: f64,
}

/// `-H ∇f` by the two-loop recursion, with the initial inverse Hessian `(s·y / y·y) I` from
/// the newest pair (Nocedal & Wright eq. 7.20); plain steepest descent without pairs.
fn quasi_newton_direction(gradient: &[f64], corrections: &VecDeque<Correction>) -> Vec<f64> {
    let mut direction: Vec<f64> = gradient.iter().map(|g| -g).collect();
    let mut alphas = Vec::with_capacity(corrections.len());
    for correction in corrections.iter().rev() {
        let alpha = correction.inverse_curvature * dot(&correction.step, &direction);
        axpy(-alpha, &correction.gradient_change, &mut direction);
        alphas.push(alpha);
    }
    if let Some(newest) = corrections.back() {
        let gamma = 1.0
            / (newest.inverse_curvature * dot(&newest.gradient_change, &newest.gradient_change));
        direction.iter_mut().for_each(|d| *d *= gamma);
    }
    for (correction, alpha) in corrections.iter().zip(alphas.iter().rev()) {
        let beta = correction.inverse_curvature * dot(&correction.gradient_change, &direction);
        axpy(alpha - beta, &correction.step, &mut direction);
    }
    direction
}

/// A trial step length with the objective and its slope along the search direction.
struct Trial {
    step: f64,
    slope: f64,
    evaluated: Evaluated,
}

/// The acceptance and bracketing tests of one line search.
struct StepTests {
    start_value: f64,
    initial_slope: f64,
    /// `start_value` plus the rounding allowance.
    ceiling: f64,
}

impl StepTests {
    fn sufficient_decrease(&self, trial: &Trial) -> bool {
        trial.evaluated.value
            <= self.start_value + SUFFICIENT_DECREASE * trial.step * self.initial_slope
    }

    /// Strong Wolfe, or approximate Wolfe: for a quadratic, sufficient decrease is equivalent
    /// to `slope <= (2 c1 - 1) initial_slope`, which stays measurable when the values' rounding
    /// swamps the decrease; the value must then only not exceed the rounding ceiling.
    fn acceptable(&self, trial: &Trial) -> bool {
        let flat_enough = trial.slope.abs() <= -CURVATURE * self.initial_slope;
        let approximate_decrease = trial.evaluated.value <= self.ceiling
            && trial.slope <= (2.0 * SUFFICIENT_DECREASE - 1.0) * self.initial_slope;
        flat_enough && (self.sufficient_decrease(trial) || approximate_decrease)
    }

    /// A minimiser lies before this step: the slope turned non-negative, or the value rose
    /// by more than rounding explains (NaN and infinite values included).
    fn overshot(&self, trial: &Trial) -> bool {
        trial.slope >= 0.0
            || !(self.sufficient_decrease(trial) || trial.evaluated.value <= self.ceiling)
    }
}

/// Finds an acceptable step along `direction`; `None` when the direction is not a descent
/// direction, the bracket shrinks to nothing or the evaluation budget runs out.
fn line_search<F>(
    objective: &mut F,
    start: &Evaluated,
    direction: &[f64],
    initial_step: f64,
) -> Option<Evaluated>
where
    F: FnMut(&[f64], &mut [f64]) -> f64,
{
    let initial_slope = dot(&start.gradient, direction);
    if initial_slope.is_nan() || initial_slope >= 0.0 {
        return None;
    }
    let tests = StepTests {
        start_value: start.value,
        initial_slope,
        ceiling: start.value + ROUNDING_ALLOWANCE * start.value.abs(),
    };
    let mut budget = MAX_LINE_SEARCH_EVALUATIONS;
    let mut try_step = |step: f64| -> Option<Trial> {
        budget = budget.checked_sub(1)?;
        let point: Vec<f64> = start
            .point
            .iter()
            .zip(direction)
            .map(|(x, d)| x + step * d)
            .collect();
        let evaluated = evaluate(objective, point);
        Some(Trial {
            step,
            slope: dot(&evaluated.gradient, direction),
            evaluated,
        })
    };

    // Expansion (Nocedal & Wright Algorithm 3.5): double the step until it is acceptable or
    // overshoots; `low` is the last step that did neither.
    let mut low = Trial {
        step: 0.0,
        slope: initial_slope,
        evaluated: start.clone(),
    };
    let mut high = loop {
        let trial = try_step(if low.step == 0.0 {
            initial_step
        } else {
            2.0 * low.step
        })?;
        if tests.acceptable(&trial) {
            return Some(trial.evaluated);
        }
        if tests.overshot(&trial) {
            break trial;
        }
        low = trial;
    };
    // Zoom (Algorithm 3.6), narrowed by the slope's sign: `low` descends and has not
    // overshot, `high` has.
    loop {
        let width = high.step - low.step;
        if width <= f64::EPSILON * high.step {
            return None;
        }
        let trial = try_step(interpolated_step(&low, &high))?;
        if tests.acceptable(&trial) {
            return Some(trial.evaluated);
        }
        if tests.overshot(&trial) {
            high = trial;
        } else {
            low = trial;
        }
    }
}

/// The next trial inside `(low.step, high.step)`, at least a tenth of the bracket away from
/// either end: where the slope, interpolated linearly (secant), reaches zero when `high`'s
/// slope is non-negative; otherwise (a value that rose while still descending) the minimiser
/// of the cubic matching both values and slopes (Nocedal & Wright eq. 3.59); the midpoint when
/// neither exists.
fn interpolated_step(low: &Trial, high: &Trial) -> f64 {
    let (a, b) = (low.step, high.step);
    let margin = 0.1 * (b - a);
    let candidate = if high.slope >= 0.0 {
        a - low.slope * (b - a) / (high.slope - low.slope)
    } else {
        let d1 =
            low.slope + high.slope - 3.0 * (low.evaluated.value - high.evaluated.value) / (a - b);
        let d2 = (d1 * d1 - low.slope * high.slope).sqrt();
        b - (b - a) * (high.slope + d2 - d1) / (high.slope - low.slope + 2.0 * d2)
    };
    if candidate.is_finite() {
        candidate.clamp(a + margin, b - margin)
    } else {
        0.5 * (a + b)
    }
}

fn evaluate<F>(objective: &mut F, point: Vec<f64>) -> Evaluated
where
    F: FnMut(&[f64], &mut [f64]) -> f64,
{
    let mut gradient = vec![0.0; point.len()];
    let value = objective(&point, &mut gradient);
    Evaluated {
        point,
        value,
        gradient,
    }
}

fn dot(left: &[f64], right: &[f64]) -> f64 {
    left.iter().zip(right).map(|(a, b)| a * b).sum()
}

fn norm(vector: &[f64]) -> f64 {
    dot(vector, vector).sqrt()
}

fn max_abs(vector: &[f64]) -> f64 {
    vector
        .iter()
        .fold(0.0, |largest, value| largest.max(value.abs()))
}

fn sub(left: &[f64], right: &[f64]) -> Vec<f64> {
    left.iter().zip(right).map(|(a, b)| a - b).collect()
}

/// `target += scale * source`.
fn axpy(scale: f64, source: &[f64], target: &mut [f64]) {
    target
        .iter_mut()
        .zip(source)
        .for_each(|(t, s)| *t += scale * s);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rosenbrock's function, the classic hard case for quasi-Newton methods; its minimum is
    /// f(1, 1) = 0 (Rosenbrock 1960).
    fn rosenbrock(x: &[f64], gradient: &mut [f64]) -> f64 {
        let (a, b) = (x[0], x[1]);
        gradient[0] = -2.0 * (1.0 - a) - 400.0 * a * (b - a * a);
        gradient[1] = 200.0 * (b - a * a);
        (1.0 - a).powi(2) + 100.0 * (b - a * a).powi(2)
    }

    #[test]
    fn finds_the_rosenbrock_minimum() {
        let settings = LbfgsSettings {
            gradient_tolerance: 1e-10,
            max_iterations: 1000,
        };
        let minimum = minimise(rosenbrock, vec![-1.2, 1.0], settings);
        assert!(minimum.termination.converged(), "{minimum:?}");
        assert!((minimum.point[0] - 1.0).abs() < 1e-7 && (minimum.point[1] - 1.0).abs() < 1e-7);
    }

    #[test]
    fn reports_the_iteration_limit() {
        let settings = LbfgsSettings {
            gradient_tolerance: 0.0,
            max_iterations: 3,
        };
        let minimum = minimise(rosenbrock, vec![-1.2, 1.0], settings);
        assert_eq!(minimum.termination, Termination::IterationLimit);
        assert_eq!(minimum.iterations, 3);
    }
}
