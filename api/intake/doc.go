// Package intake holds every source of events behind one contract, Source:
// the local journal fed over HTTP (journal.go; also an Appender), a Kafka
// topic read in a consumer group (kafka.go), and a history file (history.go,
// source.go). Each hands over events with their positions and documents its
// delivery semantics; a position is never reused for a different event. It
// knows nothing of the engine.
package intake
