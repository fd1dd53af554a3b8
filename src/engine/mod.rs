//! The engine: compiles a validated [`Patch`] into a flat [`Plan`] and runs it sample by
//! sample at an oversampled rate.
//!
//! # Pipeline
//! Sources are generated at the internal rate `K * rate` (K = `patch.oversample`) by
//! [`SourceFeed`]s; op-amp stages run in topological order over blocks of [`plan::BLOCK`]
//! internal samples, stage by stage; outputs are decimated to the base rate by linear-phase
//! half-band FIR cascades ([`halfband`]). Every delay in the pipeline ([`shaper::LOOKAHEAD`]
//! samples per op-amp stage for the clipper's lookahead, the decimator's group delay) is compensated: sources
//! start a short pre-roll before t = 0 and the first [`Plan::discard`] frames are dropped,
//! so output sample `n` is time `n / rate`. During the pre-roll a source that is on from
//! t = 0 holds its DC component, and every capacitor starts at its steady state for those
//! DC values, so measurements need no warm-up.
//!
//! # Circuit reduction (nodal analysis)
//! Passive attenuators (pots) are folded into the inputs that read them as a Thevenin source:
//! open-circuit gain and resistance, with every *other* load on the wiper (downstream input
//! resistors to a virtual ground, output loads, further attenuators) treated as a resistance
//! to 0 V. So a pot before a summing resistor changes the taper, and the resistance adds to
//! the summing resistor. An output is `v_node * load / (series + Rth + load)`.
//! Op-amp outputs are ideal voltage sources for downstream stages.
//!
//! At each op-amp, nodal elimination of the stage's circuit (`circuit::kernel::stage_form`,
//! Millman's theorem for the textbook shapes) gives `V- = m + b v` (v the op-amp output, `0 < b <= 1`)
//! and `V+` from the inputs, so `Vd = p - b v`. Capacitors enter as companion models that keep
//! each step a scalar equation. Both are the trapezoidal companion the circuit engine uses
//! (conductance `2C/h` beside a history source: no phase error, only the bilinear frequency
//! warp `f -> fs/pi tan(pi f/fs)`):
//! - a coupling capacitor in series with an input resistor: the branch conductance
//!   `1 / (R + h/2C)` with history `vc` decaying by `(2RC/h - 1) / (2RC/h + 1)`;
//! - a capacitor across a feedback resistor: conductance `2C/h`, history `vf <- 2 (v - V-) - vf`.
//!
//! (Until issue 15 these were an exponential branch and a backward-difference companion,
//! which led by half an internal sample: 18 degrees at 20 kHz at K = 4.)
//!
//! # Op-amp model
//! `dv/dt = SR tanh(Vd / Vov) - (2 pi GBW / A0) v`, `Vov = SR / (2 pi GBW)`: small signals see
//! the single pole (GBW), large ones saturate at the slew rate. Writing
//! `SR tanh(Vd/Vov) = k Vd phi(Vd)` with `k = 2 pi GBW` and `phi(x) = tanh(x/Vov)/(x/Vov)`, each
//! step is the *exact exponential step* of the resulting linear equation, with the drive
//! treated as a first-order hold between the previous and the current input (exact for
//! piecewise-linear inputs, so the closed-loop -3 dB point lands at GBW / noise gain; a
//! zero-order hold would be off by about 1 % at a quarter of the internal rate).
//!
//! How `phi` is chosen (a deliberate change from "phi implicit at the end of the step"): when
//! the loop is stiff (`k b h >> 1`, every real part at audio rates) the end-of-step equation
//! has a spurious root at equilibrium (at the end of the step Vd is small, so phi = 1, so the
//! linear step lands at equilibrium) and slewing disappears. Instead, for the step's mean
//! target the slew equation is solved in closed form: with `z = f Vd / Vov`,
//! `dz/dt = -k f b tanh z`, hence `sinh z(h) = sinh z(0) exp(-k f b h)`; the effective
//! `phi = ln(z0 / z1) / (k f b h)` (computed in the log domain, no overflow) then goes into
//! the exact first-order-hold step, and the step is limited to `|dv| <= (SR + k |v| / A0) h`,
//! a bound the exact trajectory obeys (the hold can overshoot it when the target moves by
//! several Vov within one step). Small signals give `phi = 1` and the step is exactly the
//! linear recursion `v[n] = e v[n-1] + a1 p[n] + a0 p[n-1]`, the fast path; a slewing step
//! moves by exactly `SR h` (max slope SR within 2 %, tested). No iteration, no spurious root.
//!
//! Common-mode range: `m = V+ - (V- rail + cm_low)` and the same against the top. A part
//! without reversal clips its input stage (V+ clamped to the range). A part with reversal
//! multiplies Vd by `tanh(m / 0.2 V)`; when that factor is negative the loop is positive and
//! the step is explicit at the slew rate, the state clamp holding it: a follower latches at
//! the opposite rail until the input comes back (common practice for JFET-input parts).
//!
//! Output swing: `[V- rail + drop_neg, V+ rail - drop_pos]`, shrunk to `isc / G_load` when the
//! short-circuit current into the stage's static load (feedback network, downstream input
//! resistors, output loads, each to about 0 V; capacitors ignored) is smaller. The integrator
//! state is held [`plan::STATE_MARGIN`] beyond the knee (no wind-up). Input offset voltage is
//! added at V+, bias current flows out of each input (through the source's Thevenin
//! resistance at V+, into the Millman node at V-).
//!
//! # Anti-aliasing of the output clamp (choice and measurements)
//! The clamp is a static clipper after the linear/slew solve, evaluated band-limited
//! ([`shaper`]): around each sample the drive is the polynomial of degree 6 through it and
//! its three neighbours on each side ([`shaper::LOOKAHEAD`] = 3 samples of lookahead), and the
//! clipper's residual `f(x) - x` along that curve is averaged against a triangle kernel one
//! sample wide each side, exactly (piecewise Gauss-Legendre between the crossings of the
//! limits, found on the monotone pieces of the curve). For a straight drive across a hard
//! corner this is the two-point polyBLAMP correction; the soft knee is handled by the same
//! integral. Where the drive stays in the linear region around a sample the output is the
//! drive itself, bit for bit, and no correction is applied unless the local drive really
//! crosses a limit: a crest that stays below the rail between samples is left alone. Held
//! past a limit, the output is the limit minus the kernel's smoothing of the clipped part (a
//! few millivolts at audio frequencies), bounded to the limits widened by
//! [`shaper::GIBBS`] of the span. The lookahead costs three internal samples of latency per
//! op-amp stage, compensated on every path. Measured with [`alias_probe`] (5001 Hz coherent
//! sine 7 dB past the swing at 48 kHz, unity inverter, +/-12 V), total in-band alias power:
//!
//! | K | ideal (hard clip) | jfet-general | naive clip (ideal) |
//! |---|---|---|---|
//! | 1 | -69.1 dBc | -68.8 dBc | -30.7 dBc |
//! | 2 | -76.8 dBc | -76.8 dBc | -40.7 dBc |
//! | 4 | -102.4 dBc | -101.5 dBc | -53.8 dBc |
//! | 8 | -122.4 dBc | -123.8 dBc | -65.5 dBc |
//! | 16 | -149.1 dBc | -140.5 dBc | -78.0 dBc |
//!
//! Why degree 6 (history): a straight line through a crest's neighbours (the first version)
//! crossed the rail by volts at K = 4, read a twin tone's crest clip 8 to 25 dB high and gave
//! -88.3 dBc at K = 4; the quadratic through three samples that replaced it (one sample of
//! lookahead, -100.1 dBc at K = 4) did not resolve a shallow crest under ten samples per
//! cycle: a 19/20 kHz twin tone at K = 4 read 1.2 dB low 5 % past the rail and 26 dB low at
//! 0.5 %. At that tone (0.64 rad per sample) the interpolated crest of a sine sitting half
//! way between samples is low by 3.8e-3 of its amplitude through three samples, 3.1e-4
//! through five and 2.7e-5 through seven; with five, 0.5 % past the rail still read 1.6 dB
//! low. Crest clips (tests/engine_crest.rs), third-order product of a twin tone whose crests
//! pass one rail against the densely sampled clipped waveform:
//!
//! | tones, K | 0.5 % | 1 % | 2 % | 5 % | 10 % | 30 % past the rail |
//! |---|---|---|---|---|---|---|
//! | 19/20 kHz, 4 | -0.70 | -0.06 | -0.18 | -0.37 | -0.26 | -0.25 dB |
//! | 19/20 kHz, 8 | -0.28 | +0.31 | +0.13 | -0.12 | -0.05 | -0.06 dB |
//! | 13/14 kHz, 4 | +0.35 | | -0.05 | -0.08 | -0.11 | -0.11 dB |
//!
//! (5/6 kHz at K = 4: -0.01 dB from 2 % to 30 %.) The -0.25 dB at 19/20 kHz is the kernel's
//! own in-band droop at the product's 18 kHz, `sinc^2(18 / 192)`.
//!
//! # Slew corners (issue 16)
//! A stage whose loop is stiff (`k G h >= `[`edges::STIFF`], `G = f b + eps`: every real
//! part at K = 4) takes a step that holds an event (it starts slewing, or its target's slope
//! passes the slew rate inside the step) through the stiff slew model of [`edges`]: the
//! target within the step is the quartic through the last five samples of `p` (the quadratic
//! through the last three where they do not look smooth), the output tracks the linear
//! loop's particular solution or ramps at the slew rate, and the instants where it leaves
//! the curve (tangent) and joins it again (a slope corner) are solved between samples (on a
//! quadratic, polished by Newton's iteration); each corner (slope and second derivative)
//! gets its band-limited correction on the six samples around it, with a kernel of unit
//! area, zero second moment and triple zeros at every multiple of the internal rate (so no
//! in-band droop of the harmonics the corners make; the clamp's triangle would take 4 % off
//! them at 21 kHz and K = 4). The corrections go to the output only; they need three samples
//! of lookahead, the clamp's own. Steps without an event keep the step described above bit
//! for bit. Measured with the alias estimate of a render ([`crate::alias`]: the patch's own
//! stages, tone moved to an odd coherent bin, in-band power off the harmonics, 20 Hz - 20 kHz
//! at 48 kHz; `tests/engine_edges.rs`), a single-supply part at 120 mV/us as a follower,
//! 10 kHz at 6 V peak (3.1 times its slew rate, a triangle) and at 2.5 V peak (1.3 times,
//! short slewing stretches):
//!
//! | K | 3.1x SR, before | 3.1x SR, quadratic | 3.1x SR, now | 1.3x SR, before | 1.3x SR, quadratic | 1.3x SR, now |
//! |---|---|---|---|---|---|---|
//! | 1 | -5.3 dBc | -22.2 dBc | -24.4 dBc | -21.3 dBc | -26.4 dBc | -31.2 dBc |
//! | 2 | -10.4 dBc | -44.6 dBc | -68.5 dBc | -39.4 dBc | -50.9 dBc | -52.0 dBc |
//! | 4 | -14.5 dBc | -56.7 dBc | -85.9 dBc | -49.0 dBc | -58.0 dBc | -57.4 dBc |
//! | 8 | -24.1 dBc | -77.7 dBc | -118.2 dBc | -63.2 dBc | -61.5 dBc | -61.1 dBc |
//! | 16 | -28.2 dBc | -90.6 dBc | -128.3 dBc | -74.9 dBc | -65.8 dBc | -65.7 dBc |
//!
//! ("Before": the step with the effective `phi` alone, whose corner samples, where the
//! direction reverses within a step, were off the trajectory by up to a large part of `SR h`;
//! "quadratic": the same model with the quadratic through the last three samples as its
//! target.) The target, -70 dBc at K = 4, is met at 3.1x SR. What limited the
//! quadratic was where its target put the corners (an error of order `h^3` that offsets each
//! stretch of the triangle by a different amount); the cubic through four samples read
//! -70.6 dBc at K = 4 (-99.6 at 8, -118.9 at 16), the quartic -85.9 ([`edges`], "The
//! target's order"). At 1.3x SR the target is not the limit; the suspects are the short
//! stretches between the tanh's soft start of slewing and the sharp model, and the
//! first-order hold's tracking (which the steps without an event keep; it differs from the
//! sharp model's by about `p'' h^2 / (2 k G h)`) where they switch (joining the ramp to the
//! hold's value instead gained 4 dB at K = 4 and lost 8 at K = 8: dropped). At K = 1 a tone
//! under ten samples per cycle
//! misleads any local polynomial (a slope past the slew rate that the tone does not have).
//! An abrupt start of a tone (a corner of the input) can read as a short slewing event too.
//! The fixed probe of the single-supply part (0.35 V/us against the probe's 0.74 V/us, a tone
//! that also clips): -34.2 dBc at K = 4, -45.8 dBc at K = 16 (-31 and -46 before); why it
//! gains so little is not analysed yet.
//!
//! Reversal edges (issue 16): the step in which V+ leaves the input range is split where it
//! crosses the range's end (on the quadratic through the last three samples of V+), the
//! output then ramps at the slew rate away from the target (the positive loop) and is held
//! at the rail; the step in which V+ comes back ramps from the rail toward the target from
//! that instant ([`edges`]). Every slope corner (the ramp's start, the swing, the start of
//! the return, where it meets the target) gets the correction above. A rail-to-rail jump
//! within a step has no local polynomial model, so the clamp cannot read it from the drive:
//! the samples whose clamp window holds such an edge output the static clamp of their drive
//! plus the corners' corrections, bounded like the clamp's own value. Measured the same way
//! (jfet-general follower on +/-12 V, 1 kHz at 10 and 9 V peak against an input range ending
//! at -8 V); `render` and `measure` print the estimate and warn above -60 dBc:
//!
//! | K | 2 V below the range, before | 2 V below, now | 1 V below, before | 1 V below, now |
//! |---|---|---|---|---|
//! | 1 | -3.2 dBc | -31.9 dBc | -5.7 dBc | not measured |
//! | 2 | -12.1 dBc | -57.9 dBc | -16.3 dBc | not measured |
//! | 4 | -20.0 dBc | -69.7 dBc | -22.0 dBc | -73.8 dBc |
//! | 8 | -26.1 dBc | -73.6 dBc | -29.7 dBc | -78.3 dBc |
//! | 16 | -34.1 dBc | -77.9 dBc | -37.5 dBc | -82.8 dBc |
//!
//! ("Before": one explicit step of up to `SR h` on the grid.) Without the corrections
//! (`Plan::antialias` off) the split steps alone read -21.4 dBc at K = 4 (2 V below). What
//! limits the figure now is not analysed; it gains about 4 dB per doubling of K. The
//! reversal factor is still `tanh(m / 0.2 V)` between the edges (taking it sharp for stiff
//! loops was tried: 0.1 dB at K = 4).
//!
//! An edge that starts with the op-amp's state past a rail (a reversing stage with gain,
//! whose output sits at the rail when its input leaves the range) is flat at the rail until
//! the ramp brings the state (saturated at its hold) back inside the swing: its output
//! corners are there and where the ramp reaches the other end; a return that ramps into the
//! other rail has its corner there, within its own step or a later one (the return goes on
//! while its ramp does, [`edges::SlewStep::into_rail`]); a step whose ramp has not left the
//! rail by its end keeps its drive there (it was set a whole ramp ahead, at the far rail: the
//! edge a sample early whenever the input crossed late in a step). In the samples around an
//! edge (the static clamp of the drive plus the corners' corrections) only the corners the
//! output shows are corrected ([`edges::SlewStep::visible`]): a return that ramps past the
//! other rail meets its target beyond it, in the next step when the ramp reached the rail
//! late in its own, and that corner of the state, corrected on the output, was the whole of
//! the remaining error (a quarter of the returns 0.1 to 0.15 V off at the 48 kHz output,
//! those whose rail corner fell in the last quarter of a step). A non-inverting stage of
//! gain 3 thrown from rail to rail (jfet-general, 1 kHz at 10 V peak), stage and network
//! alike:
//!
//! | K | before the edges from a rail | before the hidden corner was dropped | now |
//! |---|---|---|---|
//! | 4 | -30.1 dBc | -51.1 dBc | -81.7 dBc |
//! | 8 | -38.3 dBc | -53.2 dBc | -86.0 dBc |
//! | 16 | not measured | -69.1 dBc | -88.7 dBc |
//!
//! A dip below the range between two samples inside it (V+ grazing the range's end, as in
//! a chord averaged onto it) is found on the margin's quadratic through the last three
//! samples ([`edges::dip_roots`]: convex, lowest point inside the step and below zero) and
//! taken within the step ([`edges::SlewStep::dip`]): the reversal from the first root, the
//! return from the second, as when the crossings fall in different steps. Without it such
//! a dip is not seen at all, while a finer step (a sample in the dip) throws the output's
//! pulse. A return whose reversed ramp starts from a state still past the rail (a reversal
//! entered late in the step before) has the output's corner where that ramp leaves the
//! rail. The passive-averaging summer's `sag` variant read -48.2 dB at K = 4 (its estimate
//! against the same patch stepping 4 times finer), -60.5 dB with the dips, -79.7 dB with
//! that corner too.
//!
//! Multi-op-amp groups (circuit engine, `circuit::step::full_step`): the generic nonlinear
//! step takes the same stiff slew model for each op-amp whose loop is stiff, the target's
//! newest sample read from the group's solution and the op-amp held at the model's end
//! value in the next solve (a bracketed fixed point: the end value can jump with the
//! target). The model assumes the target independent of the op-amp's own output; where an
//! op-amp's loop factor through the group as the others now respond differs from its step's
//! by more than 5 % (another op-amp of its loop held: slewing itself, or at its swing) the
//! effective-`phi` step takes it. The corners reach the network's output band-limited: the
//! output op-amp's own, and another op-amp's scaled by the output's sensitivity to it within
//! the step (a follower passes a corner whole, an integrator a small part). The network
//! output goes through the same seven-sample clamp, with three samples of lookahead. A slow
//! part (120 mV/us) in a composite amplifier (gain 2, feedback after a fast follower), 10 kHz
//! at 6 V peak out (3.1x SR), `tests/engine_edges.rs`:
//!
//! | K | before (effective `phi`, corners on the grid) | model, no corrections | now, output at the slow part | now, output after the follower |
//! |---|---|---|---|---|
//! | 4 | -15.0 dBc | -48.5 dBc | -73.6 dBc | -73.4 dBc |
//! | 8 | -25.5 dBc | -59.6 dBc | -81.5 dBc | -80.9 dBc |
//!
//! Reversal edges in such groups take the stage engine's split steps
//! (`engine::edges::reversal_step`), with differences forced by the group: the model reads
//! the solution once the rest of the group has settled on it, a reversal edge is decided
//! once per step (its runaway direction flips with the hold on either side of the unstable
//! balance: no fixed point to iterate to), and the target is read as if the op-amp's output
//! were linear (while it is past its clamp a buffer follows the clamped node, not the
//! state) and, for the edge itself, extrapolated from the last four samples (the edge's own
//! jump drives the rest of its loop within the step). The corners of the two steps after an
//! edge go to the edge's override, as in the stage engine (added to the drive instead, the
//! part of a correction that fell on a sample held past the rail was lost in the clamp),
//! and only those the output shows. A jfet-general follower whose feedback is taken after a
//! buffer, 1 kHz at 10 V peak (2 V below the range): with an ideal buffer -69.0 dBc at K = 4
//! and -73.5 at K = 8 (-18.5 and -27.6 before the edges, -48.2 and -57.6 before the
//! override), the stage engine's -69.7 and -73.6 for the same follower; with a slewing
//! bipolar buffer -48.5 and -56.0 (-18.6 and -22.0 before), and worse at K = 16 (-40.8
//! dBc): the buffer's own slewing after the edge moves the target the model reads
//! (DEVELOPERS.md, "Known gaps"); with two reversing parts (both op-amps leave their range)
//! the loop is chaotic and the figure meaningless. A Sallen-Key low-pass with a reversing part driven below its
//! range (the part's output kicks V+ back through the first capacitor) chatters between
//! the edges, a relaxation the model makes, not an aliasing figure.
//! A feedback-diode clipper with the slow part (gain 2, antiparallel silicon diodes across
//! the feedback resistor, 10 kHz at 3 V peak in): -68.1 dBc at K = 4, -80.2 at 8 (-32.5 and
//! -42.9 before the slew corners, -65.3 and -80.0 before the loop's knees below).
//!
//! Diode knees: where a network's output is a node of a diode group read from its table (a
//! clipper or limiter after a buffer), the junctions' part of the output is replaced by its
//! mean over one sample of the table's coordinate, centred on the sample (first-order
//! antiderivative anti-aliasing, [`knee`]: no delay, the linear part untouched, only windows
//! that hold a conducting sample). A gain-10 op-amp into 4k7 and two small-signal silicon
//! diodes to ground, driven 20 dB past the knee (6 V peak at the op-amp's output),
//! `tests/engine_edges.rs`:
//!
//! | tone | K | before | now |
//! |---|---|---|---|
//! | 1 kHz | 4 | -89.3 dBc | -111.4 dBc |
//! | 1 kHz | 8 | -141.5 dBc | -150.4 dBc |
//! | 5 kHz | 4 | -47.5 dBc | -70.7 dBc |
//! | 5 kHz | 8 | -59.8 dBc | -87.9 dBc |
//! | 9 kHz | 4 | -33.1 dBc | -60.2 dBc |
//!
//! (220 Hz reads the floor, -185 dBc, either way.) Diodes whose node another part of the
//! circuit reads before the output are not corrected.
//!
//! Diode knees inside an op-amp's loop (a feedback clipper; [`loopmap`]): the group's static
//! map from its one varying input to the output (its DC solution, tabulated at compile time
//! by continuation from 0 V) is averaged over one sample of the path of the input the
//! engine's own output implies (`f^-1(y)`, so the loop's lag of a fraction of a microsecond
//! moves the mean with the knee), the map's tangent at rest taken out, and the difference
//! added to the op-amp's drive before its clamp. An inverting stage of gain -10 with two
//! small-signal silicon diodes across its 100k, 1 V peak in (about 26 dB past the knees),
//! `tests/engine_edges.rs`:
//!
//! | tone | K | before | now |
//! |---|---|---|---|
//! | 1 kHz | 4 | -69.5 dBc | -90.2 dBc |
//! | 1 kHz | 8 | -110 dBc | -124.4 dBc |
//! | 5 kHz | 4 | -34.8 dBc | -56.2 dBc |
//! | 5 kHz | 8 | -55 dBc | -77.2 dBc |
//! | 9 kHz | 4 | -29.1 dBc | -56.9 dBc |
//!
//! The mean along the undelayed input instead read -73.5 dBc at 1 kHz (the knee corrected
//! where the output does not have it); with an ideal part and no junction capacitance,
//! where the two coincide, both read -92.4. The junctions' own capacitances are stepped by
//! backward Euler (with the junction conducting their mode is far faster than a step, and
//! the trapezoidal rule left it ringing at half the step rate: -89.5 and -53.6 dBc at 1 and
//! 5 kHz with it). A precision rectifier's half that holds its op-amp at a rail is outside
//! the map (the rail and the slew back are the clamp's and the slew corners' business):
//! a half-wave rectifier at 2 V peak reads -75.3 dBc at 1 kHz and -47.2 at 5 kHz (K = 4).
//!
//! # Fast path
//! Each stage first runs a block as the linear recursion and checks it: |Vd| below
//! [`plan::FAST_VD`] times Vov (so `phi` is 1 within 1e-5), state inside its clamp, V+ inside
//! the common-mode range (20 * 0.2 V inside it for reversing parts). A block that fails is
//! recomputed sample by sample (issue 13, `run::hybrid_block`): each sample keeps the linear
//! step when it passes the same checks before and after the step, a weakly nonlinear sample
//! (`z0 = |Vd| / Vov < 1/2`, `f = 1`, `k b h >= 1`) takes the full step through per-stage
//! polynomials in `z0^2` fitted once at the Chebyshev points of the exact step
//! (`run::WeakStep`, within 3e-12 V of it, tested), and the rest takes the full step with the
//! engine's own exp/ln/sinh/asinh ([`fastmath`], a few ulp). With the fast path off
//! ([`Engine::set_fast_path`]) every sample runs the plain reference: the full model with the
//! library's functions. The clipper runs the same way on every path. When the
//! recursion's memory `e = exp(-k b h)` satisfies `e^2 <= 1e-17` (fast parts, e.g. the JFET
//! and bipolar profiles at K = 4) the weight of the output two steps back is negligible and
//! the recursion is evaluated as a three-tap FIR on p, fused with the checks (no serial
//! dependency, vectorised); otherwise it runs serially. The two paths
//! agree within 1 uV (tested; measured up to 2e-7 V). No allocation and no dynamic dispatch in
//! the per-sample loops (feeds are called once per block); the fast path does not divide (the
//! full model's step does, and calls exp/ln). On x86-64 CPUs with AVX2 the block loops are
//! compiled a second time for AVX2 and chosen at run time, once per block: the same
//! arithmetic in wider vectors (no fused multiply-add), so results do not depend on it.
//!
//! Measured (`cargo bench --bench engine`, four-input summer plus restoring inverter,
//! jfet-general, K = 4, one core of a shared 2-core machine), three-sample clamp: clean mix
//! about 1000 times real time at 48 kHz by CPU time (4.8e7 samples/s), a mix that clips all
//! the time about 65 times real time (31 before the per-sample shortcut; most of its samples
//! are weakly nonlinear, the clipped ones need the serial full step). The seven-sample clamp
//! (crest accuracy) costs about 37 % on the clean mix and 18 % on the clipping one (medians
//! of five alternating runs against the three-sample build); the README has the figures of
//! the current build.
//!
//! # Noise
//! With `patch.noise` on (the default for renders) the engine adds circuit noise, each source
//! as seeded Gaussian noise at the internal rate with per-sample sigma
//! `density * sqrt(fs_internal / 2)` (white noise of one-sided density `d` sampled at `fs`
//! has variance `d^2 fs / 2`); the decimator removes the band above the base rate's
//! Nyquist frequency. Simulated, with the same model as the analytic budget
//! ([`crate::budget`]) so that the two totals compare:
//! - thermal (Johnson-Nyquist) noise `sqrt(4 k T R)`, `k` = [`crate::budget::BOLTZMANN`]
//!   (exact, SI 2019), `T` = `patch.temperature`, as a voltage in series with each resistor:
//!   every input branch (its resistor plus the Thevenin resistance of the pots it reads: a
//!   passive resistive network's Thevenin noise is that of its Thevenin resistance),
//!   the feedback resistor (or the pot wired as a variable resistor), `r_g`, the resistance
//!   that drives a non-inverting input, and at each output the series side (series resistor
//!   plus tap resistance) and the load resistor, which is the next module's input but is
//!   counted, as in the budget: together the Thevenin noise of `Rs || RL`;
//! - each op-amp's voltage noise at V+, `density^2(f) = en^2 (1 + fc / f)`: a white part and
//!   a 1/f part shaped by a cascade of first-order shelves with log-spaced interleaved poles
//!   and zeros, two pairs per decade from 3 Hz (Keshner, "1/f noise", Proc. IEEE 1982;
//!   [`noise::Flicker`]), within 0.4 dB of `fc / f` from 20 Hz to 20 kHz at K >= 2 (tested
//!   on its exact response; at K = 1 it falls to -1.5 dB at 20 kHz, near Nyquist);
//! - each op-amp's current noise `in`, into V+ through the Thevenin resistance that drives it
//!   and into the inverting node through that node's resistance (`in / G_total` in the
//!   Millman sum).
//!
//! Every source enters the step equations through `p` (`Vd = p - b v`): a series voltage in
//! an inverting-node branch at its Millman weight (`G_i / G_total`), a V+ source directly.
//! Independent white sources entering the same equation are combined into one Gaussian with
//! the summed variance (statistically identical: a sum of independent Gaussians is Gaussian
//! with the summed variance), so a stage draws one white sample per internal sample and a
//! 1/f sample per hold. Issue 13 (cost): the white drive noise is one xoshiro256++ word per
//! sample (four generators in lockstep) summed as four 16-bit uniforms (Irwin-Hall, unit
//! variance; the decimation filter makes what reaches an output Gaussian, tested by its
//! kurtosis); the 1/f part runs at `fs / floor(fs / 64 kHz)` with a hold
//! ([`noise::FLICKER_MIN_RATE`]), driven by the same sums, its sections in a skewed
//! lockstep pipeline ([`noise::Flicker::shape_block`], bit for bit the serial cascade); an output's thermal noise, independent of the circuit, is added at the base
//! rate after decimation with its in-band density. The noise of a block is generated before
//! the fast-path decision, so both paths see the same samples (they agree within 1 uV with
//! noise on, tested); noise is tiny and linear, so the fast-path checks hold
//! ([`noise::NoiseStream`]); every stream's seed comes from the patch seed and the owner and
//! label (`stages.NAME` / `vd`, `outputs.NAME` / `thermal`), so a seed gives a bit-identical
//! render, another seed another one, and noise off gives exactly the noiseless render.
//! Buffers are sized in [`Engine::new`]; the per-sample loops do not allocate.
//!
//! Simplifications (all below the budget test's 0.5 dB on resistive stages): the noise of
//! a capacitor-coupled input branch enters at the step's companion weight, so the coupling
//! capacitor's high-pass on its own resistor's noise is not simulated; a pot read by several
//! consumers gives each an independent Thevenin noise (in the circuit they are correlated),
//! and its other loads count in that Thevenin resistance; V+ noise is not clamped by the
//! common-mode range.
//!
//! Measured (tests/engine_noise.rs, 1 s renders, 20 Hz - 20 kHz): a lone 100k resistor
//! +0.01 dB from `sqrt(4 k T R B)`; inverting stages of gain 1, 10, 100 within 0.09 dB of
//! the analytic budget (jfet-general and bipolar-lownoise); the 1/f ratio of 20-50 Hz to
//! 2-5 kHz within 0.3 dB of the closed form for fc = 100 Hz and 1 kHz (120 s renders; its
//! standard error is about 0.1 dB). Speed (the bench patch with noise on, by CPU time): about
//! 330 times real time against about 1000 without noise (140 against 850 before issue 13);
//! the stages' 1/f filters, run one after the other, are most of the rest.
//!
//! # Events
//! Per stage and step, accumulated as seconds over the internal steps processed (including
//! the sub-millisecond pre-roll): clip (drive at or past the start of the knee or the limit),
//! slew (|Vd| > Vov while the output is free to move: a step held at the swing or current
//! limit, or latched by a reversal, is not slewing), cm_out (V+ outside the input range),
//! reversed (reversal factor < 0). Also the time of the first clipped sample and the
//! extremes of each op-amp's own output (after its clamp, at the internal rate, so without
//! the decimator's band-limiting overshoot). The extremes are reduced in the clipper's
//! "whole block inside" pass (eight compare-and-select lanes, so it stays vectorised);
//! measured with the engine bench (clean mix, noise off, 10 alternating runs, medians by CPU
//! time) they cost about 9 % of the fast path (1009 -> 920 times real time).

pub mod edges;
pub mod fastmath;
pub mod feed;
pub mod halfband;
pub mod knee;
pub mod loopmap;
pub mod network;
pub mod noise;
pub mod plan;
pub mod probe;
mod run;
pub mod shaper;

pub use feed::{SourceFeed, ToneFeed};
pub use halfband::{Decimator, Upsampler};
pub use plan::{compile, Plan};
pub use probe::{alias_probe, alias_probe_with};
pub use run::Engine;

use crate::model::Patch;

/// Errors from compiling or running a patch.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EngineError {
    /// A source's waveform has no generator in the engine yet.
    #[error(
        "source `{source_name}`: wave `{wave}` is not available in the engine yet (it will be \
         wired to the signal generators later); use sine, multitone or dc"
    )]
    UnsupportedWave {
        /// Source name.
        source_name: String,
        /// Wave name.
        wave: &'static str,
    },
    /// `patch.oversample` is not a supported factor.
    #[error("patch.oversample = {value}: expected 1, 2, 4, 8 or 16")]
    BadOversample {
        /// The value given.
        value: usize,
    },
    /// An op-amp stage without a part.
    #[error("stage `{stage}`: an op-amp stage needs a part")]
    MissingPart {
        /// Stage name.
        stage: String,
    },
    /// A reference to a node that does not exist or comes later.
    #[error("{consumer}: refers to a node that does not exist or is not earlier in the patch")]
    BadNode {
        /// Who refers to it.
        consumer: String,
    },
    /// A network stage's circuit could not be compiled or solved.
    #[error("stages.{stage}: {message}")]
    Circuit {
        /// Stage name.
        stage: String,
        /// What went wrong.
        message: String,
    },
    /// A value out of range.
    #[error("{what}: expected {expected}")]
    BadValue {
        /// The key.
        what: String,
        /// What was expected.
        expected: &'static str,
    },
}

/// Event durations of one op-amp stage, seconds.
#[derive(Debug, Clone, PartialEq)]
pub struct StageEvents {
    /// Stage name.
    pub stage: String,
    /// Time at or past the swing limit (or inside its knee).
    pub clip_s: f64,
    /// Time slew-limited: |Vd| > Vov while the output is free to move (not held at the
    /// swing or current limit, not latched by a phase reversal).
    pub slew_s: f64,
    /// Time with V+ outside the input common-mode range.
    pub cm_out_s: f64,
    /// Time with the phase reversed.
    pub reversed_s: f64,
    /// Time of the first clipped sample, s from t = 0 (negative: in the pre-roll); `None`
    /// if the stage never clipped.
    pub first_clip_s: Option<f64>,
    /// Highest output of the op-amp itself (after the output clamp, at the internal rate),
    /// V; `None` before any sample.
    pub peak_pos_v: Option<f64>,
    /// Lowest output of the op-amp itself, V.
    pub peak_neg_v: Option<f64>,
}

/// Options of [`run`].
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Frames to render (default: `patch.frames()`).
    pub frames: Option<usize>,
    /// Measure the alias figure of every op-amp stage's part.
    pub alias_probe: bool,
}

/// One rendered output.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputSignal {
    /// Output name.
    pub name: String,
    /// Volts at the output node (after series resistor and load divider), base rate.
    pub samples: Vec<f64>,
}

/// Alias figure of one stage's part.
#[derive(Debug, Clone, PartialEq)]
pub struct AliasFigure {
    /// Stage name.
    pub stage: String,
    /// Part name.
    pub part: String,
    /// Alias power relative to the fundamental, dBc.
    pub dbc: f64,
}

/// Result of [`run`].
#[derive(Debug, Clone, PartialEq)]
pub struct Run {
    /// Base rate, Hz.
    pub rate: f64,
    /// Oversampling factor.
    pub oversample: usize,
    /// Outputs in patch order.
    pub outputs: Vec<OutputSignal>,
    /// Frame (base rate, from t = 0) of the first sample kept in `outputs`: 0 when every
    /// sample is kept, later when only a tail of a long render is.
    pub first_frame: usize,
    /// Events per op-amp stage.
    pub events: Vec<StageEvents>,
    /// Alias figures (when requested).
    pub alias: Vec<AliasFigure>,
}

/// The alias figure ([`alias_probe`]) of every op-amp stage's part, at the patch's rate,
/// rails and oversampling (probed once per distinct part).
pub fn alias_figures(patch: &Patch) -> Vec<AliasFigure> {
    let mut probed: Vec<(&crate::parts::OpAmp, f64)> = Vec::new();
    patch
        .stages
        .iter()
        .filter_map(|st| {
            let part = st.part.as_ref()?;
            let dbc = match probed.iter().find(|(p, _)| *p == part) {
                Some((_, d)) => *d,
                None => {
                    let d = alias_probe(part, patch.rails, patch.rate, patch.oversample);
                    probed.push((part, d));
                    d
                }
            };
            Some(AliasFigure {
                stage: st.name.clone(),
                part: part.name.clone(),
                dbc,
            })
        })
        // A part whose swing window is closed (no room to swing) gives no figure, not NaN.
        .filter(|a| a.dbc.is_finite())
        .collect()
}

/// Compile and render a patch.
pub fn run(patch: &Patch, opts: &RunOptions) -> Result<Run, EngineError> {
    let plan = compile(patch)?;
    let frames = opts.frames.unwrap_or_else(|| patch.frames());
    let mut eng = Engine::new(&plan);
    let mut bufs: Vec<Vec<f64>> = plan.outputs.iter().map(|_| vec![0.0; frames]).collect();
    {
        let mut refs: Vec<&mut [f64]> = bufs.iter_mut().map(|b| b.as_mut_slice()).collect();
        eng.process(&mut refs);
    }
    if let Some(e) = eng.failure() {
        return Err(e.clone());
    }
    let outputs = plan
        .outputs
        .iter()
        .zip(bufs)
        .map(|(o, samples)| OutputSignal {
            name: o.name.clone(),
            samples,
        })
        .collect();
    let alias = if opts.alias_probe {
        alias_figures(patch)
    } else {
        Vec::new()
    };
    Ok(Run {
        rate: plan.rate,
        oversample: plan.oversample,
        outputs,
        first_frame: 0,
        events: eng.events(),
        alias,
    })
}
