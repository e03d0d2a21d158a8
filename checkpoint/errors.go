package checkpoint

import "errors"

// Sentinel errors; match with errors.Is.
var (
	// ErrCorrupt: a checkpoint file fails a check. More precise sentinels
	// below are wrapped alongside it.
	ErrCorrupt = errors.New("checkpoint: corrupt")
	// ErrChecksum: the CRC or a SHA-256 does not match.
	ErrChecksum = errors.New("checkpoint: checksum mismatch")
	// ErrTruncated: the file is shorter (or longer) than it declares.
	ErrTruncated = errors.New("checkpoint: truncated")
	// ErrUnsupportedVersion: a format version this build does not read.
	ErrUnsupportedVersion = errors.New("checkpoint: unsupported format version")
	// ErrTooLarge: the decoded state would exceed the configured limit.
	ErrTooLarge = errors.New("checkpoint: state too large")
	// ErrNotFound: no checkpoint of that version, or none at all.
	ErrNotFound = errors.New("checkpoint: not found")
	// ErrNoStore: a read-only open found no store directory.
	ErrNoStore = errors.New("checkpoint: no store")
	// ErrReadOnly: a change was asked of a store opened read-only.
	ErrReadOnly = errors.New("checkpoint: store opened read-only")
	// ErrFenced: a write of a consumer-group generation older than the
	// newest checkpoint's (the writer lost the partition; see
	// Manifest.Generation). Nothing of it is left in the store.
	ErrFenced = errors.New("checkpoint: fenced by a newer generation")
	// ErrLocked: a lock is held by another process.
	ErrLocked = errors.New("checkpoint: locked by another process")
)
