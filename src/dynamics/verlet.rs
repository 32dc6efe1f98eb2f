//! Velocity Verlet for the nuclei (common practice; a symplectic, time-
//! reversible, second-order integrator — E. Hairer, C. Lubich, G. Wanner,
//! *Geometric Numerical Integration*, Springer 2006, ch. I.1).
//!
//! One step is split around the force evaluation so that the engine can ask
//! the back end for everything it needs at the new geometry in one call:
//!
//! 1. [`kick_drift`]: v ← v + (Δt/2) F(q)/m, then q ← q + Δt v
//!    (the half kick must come first: the drift uses the mid-step velocity);
//! 2. the caller computes F at the new q;
//! 3. [`kick`]: v ← v + (Δt/2) F(q_new)/m, completing the step. The new force
//!    is kept for the next step's first half kick, so each step costs one force.

/// First half kick with the old gradient, then a full drift.
pub fn kick_drift(q: &mut [f64], v: &mut [f64], gradient: &[f64], masses: &[f64], dt: f64) {
    for (((q, v), g), m) in q.iter_mut().zip(v.iter_mut()).zip(gradient).zip(masses) {
        *v -= 0.5 * dt * g / m;
        *q += dt * *v;
    }
}

/// Second half kick with the gradient at the new geometry.
pub fn kick(v: &mut [f64], gradient: &[f64], masses: &[f64], dt: f64) {
    for ((v, g), m) in v.iter_mut().zip(gradient).zip(masses) {
        *v -= 0.5 * dt * g / m;
    }
}
