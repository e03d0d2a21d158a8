// Package api is tidemark's running service. One goroutine, the loop
// (loop.go), alone owns the engine: it takes events from the source in
// position order, applies each (predict, score, train) once, takes
// checkpoints on cadence through the persistence room (api/persist),
// restores on request and publishes snapshots. The service (service.go)
// owns the lifecycle and the HTTP layer (http.go, guard.go, metrics.go,
// overview.go and the page in page/): handlers read only published
// snapshots and reach the loop only by commands, whose errors (errors.go)
// are mapped to statuses in one place. With Kafka intake the service is an
// instance of a consumer group (group.go, route.go, grouprestore.go): it
// owns some partitions and forwards what concerns the others to their
// owners. It holds no model math (package learner) and no replay
// (api/replay, which the service does not import).
//
// Delivery: every event comes from an intake.Source with its position; the
// engine applies a position once, so a source that delivers again changes
// nothing. An event the engine refuses is counted, written to the
// dead-letter file with its position and reason, and never trained on.
// Shutdown: stop HTTP intake, stop the source, take a shutdown checkpoint,
// commit offsets, close.
//
// A Service is safe for concurrent use by its HTTP handlers; its Config
// must not change once New has returned.
package api
