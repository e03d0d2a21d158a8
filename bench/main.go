// Command bench measures tidemark's hot paths, each beside a floor measured
// in the same run, and prints the ratios (the machine is shared and noisy:
// absolute times say little, ratios against a floor taken moments apart say
// more). Usage: go run ./bench [-json] [-quick].
//
// Cases, with their floors and the target ratio (ours/floor at most):
//
//	knn-predict         predict, W = 10 000, d = 8, k = 10      a plain loop over the same rows computing every squared distance and the minimum   1.5
//	knn-learn           insert into a full window (eviction, scale update)                                                                  0 allocs
//	rls-update          one update, d = 8                        a plain covariance-form rank-one update of the same size                   2.0, 0 allocs
//	sliding-rls-update  update + downdate, W = 500, d = 8        the rls-update floor                                                        4.0
//	replay-throughput   per event, replay of synthetic events, one rls learner   decoding the same NDJSON with encoding/json              3.0
//	http-predict        per request, POST /v1/predict, loopback, keep-alive,     the same echo setup answering a constant body            2.0
//	                    without the answer log (-only answers times it)
//	kafka-intake        per event, in-process broker → intake → engine, one rls  plain kafka-go partition readers draining the topic      1.5
package main

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"runtime"
	"runtime/pprof"
	"strconv"
	"strings"
	"testing"
	"text/tabwriter"
	"time"

	"gonum.org/v1/gonum/mat"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
)

type result struct {
	Case   string  `json:"case"`
	Ours   float64 `json:"ours_ns"`
	Floor  float64 `json:"floor_ns"`
	Ratio  float64 `json:"ratio"`
	Lo     float64 `json:"ratio_p10,omitempty"` // the ratio's spread over the paired rounds
	Hi     float64 `json:"ratio_p90,omitempty"`
	Note   string  `json:"note,omitempty"` // other floors' ratios
	Allocs float64 `json:"allocs_per_op"`
	Target float64 `json:"target_ratio,omitempty"`
	Zero   bool    `json:"zero_allocs_required,omitempty"`
	Pass   bool    `json:"pass"`
}

var quick bool

func main() {
	testing.Init()
	asJSON := flag.Bool("json", false, "print a JSON array of results")
	flag.BoolVar(&quick, "quick", false, "shorter runs (under a minute)")
	child := flag.String("replay-child", "", "internal: replay this history and print events/s (the keys case's child process)")
	only := flag.String("only", "", "run only the cases (cases: the table of ratios) or the named extra: growth, formats, keys, flood, restore, group, intervals, drift, answers, kdtree or checkpoint")
	writeKeys := flag.String("write-keys-history", "", "write the keys case's history (2 M events, 10⁶ keys) to this file and exit")
	ckDir := flag.String("checkpoint-dir", "", "with -replay-child: then time a checkpoint of the state written there and loaded back")
	loadChildDir := flag.String("load-child", "", "internal: load the newest checkpoint in this directory and print the seconds it took (the keys case's child process)")
	cpuprofile := flag.String("cpuprofile", "", "with -replay-child: write a CPU profile here")
	formatChildPath := flag.String("format-child", "", "internal: replay this history and print rows/s (the formats case's child process)")
	flag.Parse()
	if *writeKeys != "" {
		if err := writeKeysHistory(*writeKeys, 2_000_000, 1_000_000); err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(1)
		}
		return
	}
	if *formatChildPath != "" {
		formatChild(*formatChildPath)
		return
	}
	if *child != "" || *loadChildDir != "" {
		if *cpuprofile != "" {
			f, err := os.Create(*cpuprofile)
			if err == nil {
				pprof.StartCPUProfile(f)
				defer pprof.StopCPUProfile()
			}
		}
		if *loadChildDir != "" {
			loadChild(*loadChildDir)
		} else {
			replayChild(*child, *ckDir)
		}
		return
	}
	switch *only {
	case "keys":
		fmt.Print(keysScale())
		return
	case "flood":
		fmt.Print(rejectFlood())
		return
	case "restore":
		fmt.Print(restoreSkip())
		return
	case "group":
		fmt.Print(groupScale())
		return
	case "intervals":
		fmt.Print(intervalCoverage())
		return
	case "drift":
		fmt.Print(driftDetectors())
		return
	case "answers":
		fmt.Print(answerCost())
		return
	case "kdtree":
		fmt.Print(kdtreeCompare())
		return
	case "growth":
		fmt.Print(growth())
		return
	case "formats":
		fmt.Print(formatsCase())
		return
	case "checkpoint":
		r := checkpointCase()
		fmt.Printf("checkpoint-write %.0f ms, floor %.0f ms: %.2f× (p10–p90 %.2f–%.2f); %s\n", r.Ours/1e6, r.Floor/1e6, r.Ours/r.Floor, r.Lo, r.Hi, r.Note)
		return
	case "", "cases":
	default:
		fmt.Fprintf(os.Stderr, "bench: -only %q: want cases, growth, formats, keys, flood, restore, group, intervals, drift, answers, kdtree or checkpoint\n", *only)
		os.Exit(2)
	}
	bt := "1s"
	if quick {
		bt = "150ms"
	}
	flag.Set("test.benchtime", bt)
	results := []result{knnPredict(), knnLearn(), rlsUpdate(), slidingUpdate(), decodeCase(), replayCase("rls:forget=0.995"), replayCase("mean:window=100"),
		checkpointCase(), httpPredict(), kafkaIntake()}
	var extras []string
	if *only == "" {
		extras = []string{growth(), memory(), onlineVsBatch(), keysScale(), rejectFlood(), restoreSkip(), groupScale(), intervalCoverage(), driftDetectors(), answerCost(), kdtreeCompare()}
	}
	ok := true
	for i := range results {
		r := &results[i]
		if r.Floor > 0 {
			r.Ratio = r.Ours / r.Floor
		}
		r.Pass = (r.Target == 0 || r.Ratio <= r.Target) && (!r.Zero || r.Allocs == 0)
		ok = ok && r.Pass
	}
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		enc.Encode(results)
	} else {
		tw := tabwriter.NewWriter(os.Stdout, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "case\tours ns/op\tfloor ns/op\tratio\tp10–p90\ttarget\tallocs/op\t\t")
		for _, r := range results {
			floor, ratio, target, spread := "–", "–", "–", "–"
			if r.Floor > 0 {
				floor, ratio = fmt.Sprintf("%.0f", r.Floor), fmt.Sprintf("%.2f", r.Ratio)
			}
			if r.Hi > 0 {
				spread = fmt.Sprintf("%.2f–%.2f", r.Lo, r.Hi)
			}
			if r.Target > 0 {
				target = fmt.Sprintf("≤ %.1f", r.Target)
			}
			if r.Zero {
				target += ", 0 allocs"
			}
			verdict := "ok"
			if !r.Pass {
				verdict = "MISSED"
			}
			fmt.Fprintf(tw, "%s\t%.0f\t%s\t%s\t%s\t%s\t%.1f\t%s\t\n", r.Case, r.Ours, floor, ratio, spread, target, r.Allocs, verdict)
		}
		tw.Flush()
		fmt.Println()
		for _, r := range results {
			if r.Note != "" {
				fmt.Printf("  %s: %s\n", r.Case, r.Note)
			}
		}
		fmt.Printf("\n%s, %d cores, %s\n\n", runtime.Version(), runtime.NumCPU(), runtime.GOARCH)
		for _, e := range extras {
			fmt.Println(e)
		}
	}
	if !ok {
		os.Exit(1)
	}
}

func bench(f func(b *testing.B)) (nsPerOp, allocsPerOp float64) {
	r := testing.Benchmark(func(b *testing.B) { b.ReportAllocs(); f(b) })
	if r.N == 0 {
		return math.NaN(), math.NaN()
	}
	return float64(r.T.Nanoseconds()) / float64(r.N), float64(r.MemAllocs) / float64(r.N)
}

func randRows(n, d int, seed uint64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 1))
	out := make([][]float64, n)
	for i := range out {
		out[i] = make([]float64, d)
		for j := range out[i] {
			out[i][j] = rng.NormFloat64()
		}
	}
	return out
}

func mustLearner(spec string, d int) learner.Learner {
	s, err := learner.ParseSpec(spec)
	if err != nil {
		panic(err)
	}
	return learner.New(&s, d)
}

// fullKNN returns a k-NN learner with a full window of w rows, the same rows
// flat (the floor's copy) and queries.
func fullKNN(w, d int) (learner.Learner, []float64, [][]float64) {
	m := mustLearner("knn:k=10,window="+strconv.Itoa(w), d)
	rows := randRows(w+256, d, 1)
	flat := make([]float64, 0, w*d)
	for _, r := range rows[:w] {
		m.Learn(r, r[0], 0)
		flat = append(flat, r...)
	}
	return m, flat, rows[w:]
}

// knnPredictNs times predict against two floors, each in paired rounds:
// reading the window once in cache (the rows, summed with eight
// accumulators: the least any exact scan must do) and a plain scan that
// computes every squared distance and keeps the minimum.
func knnPredictNs(w, d int) (ours pair, scan pair, allocs float64) {
	m, flat, qs := fullKNN(w, d)
	i := 0
	predict := func(n int) {
		for range n {
			m.Predict(qs[i%len(qs)])
			i++
		}
	}
	var sink float64
	read := func(n int) {
		for range n {
			sink += readWindow(flat)
		}
	}
	plain := func(n int) {
		for range n {
			q := qs[i%len(qs)]
			best := math.Inf(1)
			for s := 0; s+d <= len(flat); s += d {
				row := flat[s : s+d : s+d]
				var sum float64
				for j := range row {
					diff := row[j] - q[j]
					sum += diff * diff
				}
				if sum < best {
					best = sum
				}
			}
			sink += best
		}
	}
	per := roundsOf(float64(w*d) * 0.6)
	ours = paired(predict, read, per, 41)
	scan = paired(predict, plain, per, 21)
	allocs = testing.AllocsPerRun(100, func() { m.Predict(qs[0]) })
	_ = sink
	return ours, scan, allocs
}

// readWindow sums every value of the window: reading it once.
func readWindow(x []float64) float64 {
	var s0, s1, s2, s3, s4, s5, s6, s7 float64
	for j := 0; j+8 <= len(x); j += 8 {
		r := (*[8]float64)(x[j : j+8])
		s0 += r[0]
		s1 += r[1]
		s2 += r[2]
		s3 += r[3]
		s4 += r[4]
		s5 += r[5]
		s6 += r[6]
		s7 += r[7]
	}
	return s0 + s1 + s2 + s3 + s4 + s5 + s6 + s7
}

func knnPredict() result {
	p, scan, allocs := knnPredictNs(10_000, 8)
	return result{Case: "knn-predict", Ours: p.ours, Floor: p.floor, Lo: p.lo, Hi: p.hi, Allocs: allocs, Target: 2.5,
		Note: fmt.Sprintf("floor: the window read once in cache; a plain scan of every distance: %.2f× it", scan.ratio())}
}

func knnLearn() result {
	m, _, qs := fullKNN(10_000, 8)
	ours, allocs := bench(func(b *testing.B) {
		for i := 0; i < b.N; i++ {
			m.Learn(qs[i%len(qs)], 1, 0)
		}
	})
	return result{Case: "knn-learn", Ours: ours, Allocs: allocs, Zero: true}
}

// covarianceUpdate returns the textbook RLS update, k = Pu/(λ + uᵀPu),
// θ += k·e, P = (P − k(Pu)ᵀ)/λ, for p = d + 1, as work of n updates.
func covarianceUpdate(d int) func(n int) {
	p := d + 1
	P := make([]float64, p*p)
	for i := 0; i < p; i++ {
		P[i*p+i] = 1e6
	}
	theta, pu, u := make([]float64, p), make([]float64, p), make([]float64, p)
	rows := randRows(1024, d, 2)
	const lambda = 0.999
	i := 0
	return func(n int) {
		for range n {
			x := rows[i%len(rows)]
			i++
			u[0] = 1
			copy(u[1:], x)
			var den, pred float64
			for r := 0; r < p; r++ {
				var s float64
				for c := 0; c < p; c++ {
					s += P[r*p+c] * u[c]
				}
				pu[r] = s
				den += u[r] * s
				pred += u[r] * theta[r]
			}
			den += lambda
			e := x[0] - pred
			for r := 0; r < p; r++ {
				theta[r] += pu[r] / den * e
				for c := 0; c < p; c++ {
					P[r*p+c] = (P[r*p+c] - pu[r]*pu[c]/den) / lambda
				}
			}
		}
	}
}

// learnWork returns a warmed learner's updates as work of n calls, and its
// allocations per update.
func learnWork(spec string, d int) (func(n int), float64) {
	m := mustLearner(spec, d)
	rows := randRows(1024, d, 3)
	for i := 0; i < 2000; i++ {
		m.Learn(rows[i%len(rows)], rows[i%len(rows)][0], 0)
	}
	i := 0
	work := func(n int) {
		for range n {
			x := rows[i%len(rows)]
			i++
			m.Learn(x, x[0], 0)
		}
	}
	return work, testing.AllocsPerRun(1000, func() { work(1) })
}

func learnNs(spec string, d int) (float64, float64) {
	work, allocs := learnWork(spec, d)
	ns, _ := bench(func(b *testing.B) { work(b.N) })
	return ns, allocs
}

func rlsUpdate() result {
	ours, allocs := learnWork("rls:forget=0.999", 8)
	p := paired(ours, covarianceUpdate(8), 2000, 101)
	return result{Case: "rls-update", Ours: p.ours, Floor: p.floor, Lo: p.lo, Hi: p.hi, Allocs: allocs, Target: 2.0, Zero: true,
		Note: "floor: the covariance-form update of the same size (no square-root form, no guard)"}
}

func slidingUpdate() result {
	ours, allocs := learnWork("sliding-rls:window=500", 8)
	p := paired(ours, covarianceUpdate(8), 1000, 101)
	return result{Case: "sliding-rls-update", Ours: p.ours, Floor: p.floor, Lo: p.lo, Hi: p.hi, Allocs: allocs, Target: 4.0,
		Note: "floor: one covariance-form update (ours updates and downdates)"}
}

// scenarioLines returns about n events of the demo scenario as NDJSON.
func scenarioLines(n int) []byte {
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: n/864 + 1, Seed: 5})
	return buf.Bytes()
}

// decodeCase times decoding canonical events against reading their bytes
// once (a sum over each line: the least a decoder must do), in paired
// rounds; encoding/json into a struct of the same fields is a second floor.
func decodeCase() result {
	lines := bytes.Split(bytes.TrimSpace(scenarioLines(20_000)), []byte("\n"))
	var ev learner.Event
	var keys learner.Keys // as a reader decodes: keys interned
	i := 0
	decode := func(n int) {
		for range n {
			keys.Decode(lines[i%len(lines)], &ev)
			i++
		}
	}
	var sink int
	read := func(n int) {
		for range n {
			for _, c := range lines[i%len(lines)] {
				sink += int(c)
			}
			i++
		}
	}
	type wire struct {
		Time     string         `json:"time"`
		Key      string         `json:"key"`
		Features map[string]any `json:"features"`
		Target   float64        `json:"target"`
	}
	std := func(n int) {
		for range n {
			var w wire
			json.Unmarshal(lines[i%len(lines)], &w)
			i++
		}
	}
	p := paired(decode, read, 5000, 101)
	j := paired(decode, std, 2000, 41)
	allocs := testing.AllocsPerRun(1000, func() { decode(1) })
	_ = sink
	return result{Case: "decode", Ours: p.ours, Floor: p.floor, Lo: p.lo, Hi: p.hi, Allocs: allocs, Target: 3.0,
		Note: fmt.Sprintf("floor: reading each line's bytes once; encoding/json into a struct of the same fields: %.2f× ours", 1/j.ratio())}
}

// replayCase times replay of the demo scenario through one learner against
// reading and decoding the same history (intake's reader, the event
// decoder, one goroutine), in paired rounds of 20 000 events.
func replayCase(spec string) result {
	data := scenarioLines(20_000)
	sp, _ := learner.ParseSpec(spec)
	cfg := learner.Config{Learners: []learner.Spec{sp}, Features: learner.FeatureConfig{HashBuckets: 4}}
	var events int64
	run := func(n int) {
		for range n {
			eng, _ := learner.NewEngine(cfg)
			replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(data)), eng, replay.ReplayConfig{})
			events = eng.Applied()
		}
	}
	var ev learner.Event
	readDecode := func(n int) {
		for range n {
			var keys learner.Keys
			h := intake.NewHistoryReader(bytes.NewReader(data))
			for {
				line, _, err := h.Next()
				if err != nil {
					break
				}
				keys.Decode(line, &ev)
			}
		}
	}
	p := paired(run, readDecode, 1, 31)
	per := float64(events)
	return result{Case: "replay-" + strings.SplitN(spec, ":", 2)[0], Ours: p.ours / per, Floor: p.floor / per, Lo: p.lo, Hi: p.hi, Target: 1.3,
		Note: fmt.Sprintf("per event, %s; floor: reading and decoding the same history on one goroutine (ours decodes on a second)", spec)}
}

func httpPredict() result {
	// The answering path itself; what logging each answer for served
	// scoring adds (an fsync per call, shared by concurrent calls) is the
	// answers extra's figure.
	svc, stop := runService(api.Config{MinScored: -1, NoAnswerLog: true})
	base := "http://" + svc.Addr()
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: 4}}
	resp, err := client.Post(base+"/v1/events", "application/x-ndjson", bytes.NewReader(scenarioLines(2000)))
	if err != nil {
		panic(err)
	}
	resp.Body.Close()
	time.Sleep(500 * time.Millisecond) // the snapshot publishes
	row := []byte(`{"key":"room-b","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`)
	call := func(url string) func(b *testing.B) {
		return func(b *testing.B) {
			for i := 0; i < b.N; i++ {
				resp, err := client.Post(url, "application/json", bytes.NewReader(row))
				if err != nil {
					b.Fatal(err)
				}
				io.Copy(io.Discard, resp.Body)
				resp.Body.Close()
				if resp.StatusCode != 200 {
					b.Fatalf("predict: %s", resp.Status)
				}
			}
		}
	}
	ours, allocs := bench(call(base + "/v1/predict"))
	stop()
	ln, _ := net.Listen("tcp", "127.0.0.1:0")
	srv := &http.Server{Handler: api.FloorHandler()}
	go srv.Serve(ln)
	floor, _ := bench(call("http://" + ln.Addr().String() + "/v1/predict"))
	srv.Close()
	return result{Case: "http-predict", Ours: ours, Floor: floor, Allocs: allocs, Target: 2.0}
}

func kafkaIntake() result {
	n := 200_000
	if quick {
		n = 60_000
	}
	lines := bytes.Split(bytes.TrimSpace(scenarioLines(n)), []byte("\n"))
	addr, last, closeBroker := topicOf(3, lines, false)
	defer closeBroker()

	got, firstAt, err := intake.Drain(context.Background(), []string{addr}, "events", last)
	if err != nil {
		panic(err)
	}
	floor := float64(time.Since(firstAt).Nanoseconds()) / float64(got-1) // from the first message, as for ours

	svc, stop := runService(api.Config{CheckpointEvery: 1 << 40,
		Kafka: &intake.KafkaConfig{Brokers: []string{addr}, Topic: "events", Group: "bench"}})
	// Time from the first handled event to the last: joining the group is
	// a one-off cost, not a per-event one.
	total := int64(len(lines))
	var first time.Time
	var firstN int64
	for {
		n := svc.Handled()
		if n > 0 && first.IsZero() {
			first, firstN = time.Now(), n
		}
		if n >= total {
			break
		}
		time.Sleep(100 * time.Microsecond)
	}
	ours := float64(time.Since(first).Nanoseconds()) / float64(total-firstN)
	stop()
	return result{Case: "kafka-intake", Ours: ours, Floor: floor, Target: 1.5}
}

// runService starts the service with one rls learner in a temporary data
// directory, on a loopback port, on top of cfg; stop ends it and removes the
// directory.
func runService(cfg api.Config) (*api.Service, func()) {
	dir, err := os.MkdirTemp("", "tidemark-bench-")
	if err != nil {
		panic(err)
	}
	spec, _ := learner.ParseSpec("rls:forget=0.995")
	cfg.Listen, cfg.DataDir = "127.0.0.1:0", dir
	cfg.Engine = learner.Config{Learners: []learner.Spec{spec}, Features: learner.FeatureConfig{HashBuckets: 4}}
	svc, err := api.New(cfg)
	if err != nil {
		panic(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	return svc, func() { cancel(); <-done; os.RemoveAll(dir) }
}

// slope is the least-squares slope of log y on log x.
func slope(xs, ys []float64) float64 {
	var mx, my float64
	for i := range xs {
		mx += math.Log(xs[i])
		my += math.Log(ys[i])
	}
	mx, my = mx/float64(len(xs)), my/float64(len(xs))
	var num, den float64
	for i := range xs {
		dx := math.Log(xs[i]) - mx
		num += dx * (math.Log(ys[i]) - my)
		den += dx * dx
	}
	return num / den
}

func growth() string {
	var b strings.Builder
	fmt.Fprintln(&b, "growth: knn-predict ns/op (k = 10)")
	ws := []int{1000, 10_000, 100_000}
	ds := []int{2, 8, 32}
	if quick {
		ws = []int{1000, 10_000, 50_000}
	}
	grid := map[[2]int]float64{}
	fmt.Fprintf(&b, "  %8s", "W \\ d")
	for _, d := range ds {
		fmt.Fprintf(&b, " %10d", d)
	}
	fmt.Fprintln(&b)
	for _, w := range ws {
		fmt.Fprintf(&b, "  %8d", w)
		for _, d := range ds {
			p, _, _ := knnPredictNs(w, d)
			ns := p.ours
			grid[[2]int{w, d}] = ns
			fmt.Fprintf(&b, " %10.0f", ns)
		}
		fmt.Fprintln(&b)
	}
	var xw, yw, xd, yd []float64
	for _, w := range ws {
		xw, yw = append(xw, float64(w)), append(yw, grid[[2]int{w, 8}])
	}
	for _, d := range ds {
		xd, yd = append(xd, float64(d)), append(yd, grid[[2]int{10_000, d}])
	}
	fmt.Fprintf(&b, "  fitted exponent: %.2f in W (d = 8), %.2f in d (W = 10 000)\n", slope(xw, yw), slope(xd, yd))
	fmt.Fprintln(&b, "growth: rls-update ns/op")
	var xp, yp []float64
	for _, d := range ds {
		ns, _ := learnNs("rls:forget=0.999", d)
		fmt.Fprintf(&b, "  d = %2d (p = %2d): %8.0f\n", d, d+1, ns)
		xp, yp = append(xp, float64(d+1)), append(yp, ns)
	}
	fmt.Fprintf(&b, "  fitted exponent: %.2f in p = d + 1\n", slope(xp, yp))
	return b.String()
}

func memory() string {
	const w, d = 10_000, 8
	runtime.GC()
	var m0, m1 runtime.MemStats
	runtime.ReadMemStats(&m0)
	rows := randRows(1, d, 9)
	m := mustLearner("knn:k=10,window="+strconv.Itoa(w), d)
	for i := 0; i < w; i++ {
		m.Learn(rows[0], 1, int64(i))
	}
	runtime.GC()
	runtime.ReadMemStats(&m1)
	held := float64(m1.HeapAlloc-m0.HeapAlloc) / w
	runtime.KeepAlive(m)
	return fmt.Sprintf("memory: knn holds %.1f bytes per window event (W = %d, d = %d) against the raw d·8 = %d: %.2f× (target ≤ 1.5×)\n",
		held, w, d, d*8, held/float64(d*8))
}

// onlineVsBatch compares rls per event with refitting ordinary least squares
// (gonum) over a week's window once per simulated hour (12 events at five
// minutes), per event.
func onlineVsBatch() string {
	const d, window, perHour = 8, 2016, 12
	rows := randRows(window+1024, d, 11)
	online, _ := learnNs("rls:forget=0.995", d)
	X := mat.NewDense(window, d+1, nil)
	y := mat.NewVecDense(window, nil)
	for i := 0; i < window; i++ {
		X.Set(i, 0, 1)
		for j := 0; j < d; j++ {
			X.Set(i, j+1, rows[i][j])
		}
		y.SetVec(i, rows[i][0])
	}
	refit, _ := bench(func(b *testing.B) {
		for i := 0; i < b.N; i++ {
			var theta mat.VecDense
			theta.SolveVec(X, y)
		}
	})
	batch := refit / perHour
	return fmt.Sprintf("online against batch: rls %.0f ns per event; refitting OLS (gonum, W = %d, p = %d) once an hour costs %.0f ns per event (%.0f per refit): %.0f× the online cost, and its model is up to an hour old\n",
		online, window, d+1, batch, refit, batch/online)
}

// checkpointCase times writing a checkpoint of 100 000 keys (rls d = 8 and
// mean:window=100 each, three events a key) against writing and syncing
// the same number of bytes to a plain file, in alternating rounds.
func checkpointCase() result {
	var specs []learner.Spec
	for _, s := range []string{"rls:forget=0.99", "mean:window=100"} {
		sp, _ := learner.ParseSpec(s)
		specs = append(specs, sp)
	}
	eng, _ := learner.NewEngine(learner.Config{Learners: specs})
	rng := rand.New(rand.NewPCG(1, 2))
	ev := &learner.Event{Features: make([]learner.Feature, 8)}
	for j := range ev.Features {
		ev.Features[j].Name = "f" + strconv.Itoa(j)
	}
	keys := 100_000
	if quick {
		keys = 20_000
	}
	for i := 0; i < 3*keys; i++ {
		ev.Key = "key-" + strconv.Itoa(i%keys)
		for j := range ev.Features {
			ev.Features[j].Num = math.Round(rng.NormFloat64()*100) / 100 // sensor readings: two decimals
		}
		ev.Target = math.Round(rng.NormFloat64()*1000) / 100
		eng.Apply(learner.Position{Offset: int64(i)}, ev)
	}
	dir, err := os.MkdirTemp("", "tidemark-bench-ck-")
	if err != nil {
		panic(err)
	}
	defer os.RemoveAll(dir)
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: filepath.Join(dir, "store"), Retain: 2})
	if err != nil {
		panic(err)
	}
	defer store.Close()
	var info checkpoint.Info
	save := func(n int) {
		for range n {
			if info, err = persist.Save(store, eng, checkpoint.Manual, 0, nil); err != nil {
				panic(err)
			}
		}
	}
	save(1)
	// The floor writes the checkpoint's own bytes: zeros, which some virtual
	// disks store without writing them, would flatter it.
	data, err := os.ReadFile(filepath.Join(store.Dir(), checkpoint.FileName(info.Version)))
	if err != nil {
		panic(err)
	}
	// Like the store, it writes a new file each time and removes the one
	// before the last (the store keeps two).
	round := 0
	floor := func(n int) {
		for range n {
			round++
			if err := writeSynced(filepath.Join(dir, fmt.Sprintf("floor-%d", round)), data); err != nil {
				panic(err)
			}
			os.Remove(filepath.Join(dir, fmt.Sprintf("floor-%d", round-2)))
		}
	}
	p := paired(save, floor, 1, 9)
	return result{Case: "checkpoint-write", Ours: p.ours, Floor: p.floor, Lo: p.lo, Hi: p.hi, Target: 3.0,
		Note: fmt.Sprintf("%d keys, rls + mean:window=100: %.0f MB raw, %.0f MB file; floor: writing and syncing the same bytes to a plain file",
			keys, float64(info.RawBytes)/1e6, float64(info.Bytes)/1e6)}
}

// writeSynced writes data to a new file at path in 1 MiB writes and syncs it.
func writeSynced(path string, data []byte) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	for n := 0; n < len(data); n += 1 << 20 {
		if _, err := f.Write(data[n:min(n+1<<20, len(data))]); err != nil {
			f.Close()
			return err
		}
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
