// Package api runs tidemark: the loops that tie an intake source to the
// learning engine — today the prequential replay of a history file — and the
// renderings of its reports. It holds no model math: everything learned is
// learned by package learner.
//
// Delivery: replay assigns each line its number as position (partition 0);
// the engine applies a position once. A line that does not decode, or that
// the engine refuses, is counted as rejected, reported with its line number,
// and never trained on.
package api
