package api

import (
	"errors"
	"fmt"
	"net/http"

	"github.com/labstack/echo/v4"

	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Sentinel errors of the loop's commands. The loop says what went wrong in
// these terms; the HTTP layer alone turns them into statuses (statusOf).
var (
	// ErrInvalidRequest: the command cannot be carried out as asked (a
	// malformed skip range, say). HTTP 400.
	ErrInvalidRequest = errors.New("api: invalid request")
	// ErrNoCheckpoint: no checkpoint of that version. HTTP 404.
	ErrNoCheckpoint = errors.New("api: no such checkpoint")
	// ErrConflict: the command conflicts with the service's state (nothing
	// to skip, another range than the damage's). HTTP 409, as are
	// checkpoint.ErrCorrupt and persist.ErrResume.
	ErrConflict = errors.New("api: conflicts with the service's state")
	// ErrNotStored: what the command needed written could not be stored
	// durably; the state is as before. HTTP 503.
	ErrNotStored = errors.New("api: could not be stored durably")
	// ErrMoved: in a consumer group, the partition the command is about is
	// not this instance's (any more). HTTP 503: retry, it reaches the owner.
	ErrMoved = errors.New("api: the partition is another instance's")
)

// cmdError is a command's error: the message the user reads, which sentinel
// it is, and the cause (for the log).
type cmdError struct {
	kind  error
	msg   string
	cause error
}

func (e *cmdError) Error() string           { return e.msg }
func (e *cmdError) Is(target error) bool    { return target == e.kind }
func (e *cmdError) Unwrap() error           { return e.cause }
func (e *cmdError) withCause(c error) error { e.cause = c; return e }

func cmdErr(kind error, format string, args ...any) *cmdError {
	return &cmdError{kind: kind, msg: fmt.Sprintf(format, args...)}
}

// statusOf maps a command's error to its HTTP status.
func statusOf(err error) int {
	switch {
	case errors.Is(err, ErrInvalidRequest):
		return http.StatusBadRequest
	case errors.Is(err, ErrNoCheckpoint):
		return http.StatusNotFound
	case errors.Is(err, ErrConflict), errors.Is(err, checkpoint.ErrCorrupt), errors.Is(err, persist.ErrResume), errors.Is(err, learner.ErrCorruptState):
		return http.StatusConflict
	case errors.Is(err, ErrNotStored), errors.Is(err, ErrMoved):
		return http.StatusServiceUnavailable
	}
	return http.StatusInternalServerError
}

// answer turns a command's error into the HTTP error the handler returns,
// keeping the cause for the log.
func answer(err error) error {
	return echo.NewHTTPError(statusOf(err), err.Error()).SetInternal(err)
}
