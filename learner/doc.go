// Package learner is tidemark's deterministic learning core: the Learner
// contract and its kinds (knn, rls, sliding-rls, mean), spec parsing, the
// feature pipeline, prequential scoring, Page–Hinkley drift watch, and the
// Engine that applies one event at a time to every learner of its key and
// encodes its whole state to deterministic bytes.
//
// Invariants:
//   - For every event and every learner: predict, then score that prediction
//     against the target, then train (test-then-train). A learner never sees
//     an event's target before its prediction for it has been scored.
//   - The state after events 1..n is a pure function of (Config, events 1..n).
//     Nothing here reads a clock, starts a goroutine or does I/O; time comes
//     only from event times, and encodings never depend on map order.
//   - Inputs from outside (event bytes, specs, state bytes) return errors that
//     wrap the sentinels in errors.go; only programmer errors (a vector of the
//     wrong length) panic.
//   - Predict, score and train allocate nothing once a key's learners exist.
//
// Concurrency: no type here is safe for concurrent use. The service owns an
// Engine on one goroutine and serves readers from published copies.
package learner
