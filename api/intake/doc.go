// Package intake reads events from the sources tidemark learns from and hands
// each one over with its position. Today: history files (NDJSON, plain or
// compressed). Each source documents its delivery semantics; a position is
// never reused for a different event.
package intake
