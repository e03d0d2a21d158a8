package learner

import "errors"

// Sentinel errors. Callers match them with errors.Is; messages are wrapped
// with the parameter, feature or stream position they concern.
var (
	// ErrInvalidSpec: a learner spec names an unknown kind or parameter, or a
	// value out of range.
	ErrInvalidSpec = errors.New("learner: invalid spec")
	// ErrInvalidEvent: an event cannot be decoded or fails validation.
	ErrInvalidEvent = errors.New("learner: invalid event")
	// ErrRejected: a well-formed event that the engine refuses (schema
	// mismatch, missing time, key cap). It is counted and never trained on.
	ErrRejected = errors.New("learner: event rejected")
	// ErrDimension: a feature vector's length does not match the schema.
	ErrDimension = errors.New("learner: dimension mismatch")
	// ErrNotReady: a learner has not trained on enough events to predict.
	ErrNotReady = errors.New("learner: not ready")
	// ErrUnknownLearner: no learner of that name is configured.
	ErrUnknownLearner = errors.New("learner: unknown learner")
	// ErrUnknownKey: no learners exist yet for that key.
	ErrUnknownKey = errors.New("learner: unknown key")
	// ErrCorruptState: encoded state bytes do not decode.
	ErrCorruptState = errors.New("learner: corrupt state")
)

// Messages of panics raised for programmer errors (shape mismatches inside
// the package); data conditions never panic.
const (
	badDim   = "learner: vector length does not match the learner's dimension"
	badOrder = "learner: features not sorted by name"
)
