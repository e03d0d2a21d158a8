// Package replay is the offline comparison: it replays a recorded history
// through the engine test-then-train, in order, one line per position, with
// decoding on a second goroutine (Replay) or the learners spread over one
// engine per CPU with an identical report (ReplayParallel); it checkpoints
// and resumes through the persistence room (api/persist), proving on resume
// that the history extends the one the checkpoint covered; and it prints
// the comparison table (WriteTable). Its charts are in replay/chart.
//
// The service does not import it. An engine belongs to the goroutine that
// runs Replay on it; nothing here is safe for concurrent use on one engine.
package replay
