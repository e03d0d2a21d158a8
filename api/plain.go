package api

import "regexp"

// pkgPrefix matches the package prefixes of Go error texts ("checkpoint: ",
// "learner: ") at the start of a message or of a wrapped part of it. The
// sentinel errors keep them, for code and logs; what a person reads does not.
var pkgPrefix = regexp.MustCompile(`(^|: |; )(learner|checkpoint|intake|persist|api|replay|window|chart): `)

// Plain returns an error message as a person should read it: without the
// package prefixes of the errors it wraps.
func Plain(msg string) string {
	for {
		n := pkgPrefix.ReplaceAllString(msg, "$1")
		if n == msg {
			return n
		}
		msg = n
	}
}
