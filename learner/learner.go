package learner

// Learner is one online regression model. For every event the Engine calls,
// in this order: Advance(t) when the event has a time, Predict(x) — whose
// answer is scored against the target before the learner sees it — and then
// Learn(x, y, t). x has the dimension the learner was built for, in schema
// order; a wrong length panics (a programmer error).
//
// Implementations are not safe for concurrent use: Predict uses scratch space
// held by the learner. The Engine owns its learners on one goroutine; readers
// work on snapshots (copies made with Clone or decoded from state bytes).
type Learner interface {
	// Advance moves the learner's event clock to t (Unix nanoseconds),
	// evicting what a time window no longer covers. Learners without a time
	// window ignore it.
	Advance(t int64)
	// Predict returns the prediction for x and whether the learner is ready
	// (see Ready in DESIGN.md: enough events trained for every coefficient,
	// or a non-empty window).
	Predict(x []float64) (y float64, ok bool)
	// Learn trains on one labelled event at time t (0 when the event has no
	// time and the learner does not need one).
	Learn(x []float64, y float64, t int64)
	// Trained returns the number of events trained on.
	Trained() int64
	// predictShared is Predict with scratch space of its own: several
	// goroutines may call it at once on a learner nobody is changing (a
	// published copy). It allocates; the engine's hot path uses Predict.
	predictShared(x []float64) (y float64, ok bool)
	// clone returns an independent copy (scratch space, if any, shared
	// with the original: the engine copies a key it published before
	// changing it, on the same goroutine).
	clone() Learner
	// cloneInto is clone into dst's storage, a learner of the same engine
	// that nobody reads any more (Engine.own recycles them), when it has the
	// same kind and shape; otherwise it is clone.
	cloneInto(dst Learner) Learner
	// rebind makes the learner use the working space *sp (made when nil)
	// instead of its engine's: it moves to another engine (Engine.Merge).
	rebind(sp **scratch)
	// held estimates the bytes the learner holds, from what it holds (rows,
	// coefficients), not from its allocations: the same for a learner and
	// its decoded copy, so that a memory budget refuses the same keys after
	// a restart as without one.
	held() int64
	// touch reads a word of each of the learner's arrays and returns
	// something of it, so that the memory it will work on is on its way
	// to the cache (see Engine.Prefetch).
	touch() float64

	encode(w *encoder)
	decode(r *decoder) error
}

// Coefficients is implemented by learners with a linear model: it returns the
// current coefficient vector (intercept first when there is one). dst is
// reused when long enough.
type Coefficients interface {
	Coefficients(dst []float64) []float64
}

// New builds the learner of spec s for d-dimensional feature vectors. The
// learner keeps s's settings by reference (the keys of an engine share
// their spec's): s must not change while the learner is in use.
func New(s *Spec, d int) Learner { return newShared(s, d, new(*scratch)) }

// newShared is New with working space shared through *sp, made when nil:
// the engine gives every key's learner of one spec the same.
func newShared(s *Spec, d int, sp **scratch) Learner {
	switch s.Kind {
	case KindKNN:
		return newKNN(s.KNN, d)
	case KindRLS:
		return newRLSShared(&s.RLS, d, sp)
	case KindSlidingRLS:
		return newSlidingShared(s.Sliding, d, sp)
	case KindMean:
		return newMean(&s.Mean)
	}
	panic("learner: unknown kind " + s.Kind.String())
}
