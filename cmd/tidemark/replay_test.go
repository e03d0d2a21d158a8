package main

import (
	"bytes"
	"compress/gzip"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"
)

// refTol: the reference below computes every prediction from scratch (sorts,
// two-pass means, a gonum solve of the closed form); tidemark computes them
// incrementally, so the two agree to rounding, not bit for bit.
const refTol = 1e-9

type refRow struct {
	x []float64 // in lexicographic order of feature name: alpha, zeta
	y float64
}

// reference scores a stream by DESIGN.md's semantics, written plainly and
// independently of package learner: each key's history is kept whole and
// every prediction is recomputed from it.
type reference struct {
	scored, unscored      int
	sumAbs, sumSq, sumErr float64
}

func (r *reference) score(y float64, pred float64, ok bool) {
	if !ok {
		r.unscored++
		return
	}
	e := y - pred
	r.scored++
	r.sumAbs += math.Abs(e)
	r.sumSq += e * e
	r.sumErr += e
}

// knnRef: last `window` rows, Euclidean distance on raw values, sorted by
// distance then recency; mean (or inverse-distance weighted mean) of the k first.
func knnRef(hist []refRow, window int, k int, inverse bool, q []float64) (float64, bool) {
	if window > 0 && len(hist) > window {
		hist = hist[len(hist)-window:]
	}
	if len(hist) == 0 {
		return 0, false
	}
	type c struct {
		d2  float64
		age int
		y   float64
	}
	var cs []c
	for i, h := range hist {
		var s float64
		for j := range q {
			s += (h.x[j] - q[j]) * (h.x[j] - q[j])
		}
		cs = append(cs, c{s, len(hist) - i, h.y})
	}
	sort.Slice(cs, func(a, b int) bool {
		if cs[a].d2 != cs[b].d2 {
			return cs[a].d2 < cs[b].d2
		}
		return cs[a].age < cs[b].age
	})
	cs = cs[:min(k, len(cs))]
	if inverse && cs[0].d2 > 0 {
		var num, den float64
		for _, v := range cs {
			num += v.y / math.Sqrt(v.d2)
			den += 1 / math.Sqrt(v.d2)
		}
		return num / den, true
	}
	var s float64
	n := 0
	for _, v := range cs {
		if inverse && v.d2 > 0 {
			break
		}
		s += v.y
		n++
	}
	return s / float64(n), true
}

func meanRef(hist []refRow, window int) (float64, bool) {
	if len(hist) > window {
		hist = hist[len(hist)-window:]
	}
	if len(hist) == 0 {
		return 0, false
	}
	var s float64
	for _, h := range hist {
		s += h.y
	}
	return s / float64(len(hist)), true
}

// rlsRef solves the closed form (Σ λ^(n−i) uuᵀ + λⁿ/p0·I)θ = Σ λ^(n−i) u y with
// gonum, u = [1, x]; it predicts once n ≥ p = 3.
func rlsRef(hist []refRow, lambda, p0 float64, q []float64) (float64, bool) {
	const p = 3
	n := len(hist)
	if n < p {
		return 0, false
	}
	a := mat.NewDense(p, p, nil)
	b := mat.NewVecDense(p, nil)
	for i, h := range hist {
		u := []float64{1, h.x[0], h.x[1]}
		w := math.Pow(lambda, float64(n-1-i))
		for r := 0; r < p; r++ {
			b.SetVec(r, b.AtVec(r)+w*u[r]*h.y)
			for c := 0; c < p; c++ {
				a.Set(r, c, a.At(r, c)+w*u[r]*u[c])
			}
		}
	}
	for r := 0; r < p; r++ {
		a.Set(r, r, a.At(r, r)+math.Pow(lambda, float64(n))/p0)
	}
	var theta mat.VecDense
	if err := theta.SolveVec(a, b); err != nil {
		panic(err)
	}
	return theta.AtVec(0) + theta.AtVec(1)*q[0] + theta.AtVec(2)*q[1], true
}

type replayLearner struct {
	Name     string   `json:"name"`
	Spec     string   `json:"spec"`
	Scored   int      `json:"scored"`
	Unscored int      `json:"unscored"`
	MAE      *float64 `json:"mae"`
	RMSE     *float64 `json:"rmse"`
	Bias     *float64 `json:"bias"`
}

type replayOutput struct {
	Events   int             `json:"events"`
	Rejected int             `json:"rejected"`
	Learners []replayLearner `json:"learners"`
}

// TestReplayJSONMatchesReference runs `tidemark replay --json` over a plain
// and a keyed stream (with bad lines among them) and checks every learner's
// scores against the plain reference above.
func TestReplayJSONMatchesReference(t *testing.T) {
	specs := []string{"knn:k=3,window=20,scale=none", "knn:k=4,window=all,weight=inverse,scale=none", "mean:window=5", "rls:forget=0.98,p0=100"}
	for _, keys := range [][]string{{""}, {"north", "south", "east"}} {
		t.Run(fmt.Sprintf("%d keys", len(keys)), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(uint64(len(keys)), 3))
			var lines []string
			hist := map[string][]refRow{}
			refs := make([]reference, len(specs))
			events, badLines := 0, []int{}
			for i := 0; i < 400; i++ {
				if i%97 == 13 {
					lines = append(lines, `{"features":{"alpha":1,"zeta":2}}`) // no target
					badLines = append(badLines, len(lines))
					continue
				}
				key := keys[i%len(keys)]
				// Integer features on a small grid, so k-NN meets many exact ties.
				alpha, zeta := float64(rng.IntN(6)), float64(rng.IntN(4))
				y := math.Round((2*alpha-zeta+float64(i%24)/4+rng.NormFloat64())*100) / 100
				keyField := ""
				if key != "" {
					keyField = fmt.Sprintf(`"key":%q,`, key)
				}
				lines = append(lines, fmt.Sprintf(`{%s"features":{"zeta":%g,"alpha":%g},"target":%g}`, keyField, zeta, alpha, y))
				q := []float64{alpha, zeta}
				h := hist[key]
				p0, ok0 := knnRef(h, 20, 3, false, q)
				p1, ok1 := knnRef(h, 0, 4, true, q)
				p2, ok2 := meanRef(h, 5)
				p3, ok3 := rlsRef(h, 0.98, 100, q)
				refs[0].score(y, p0, ok0)
				refs[1].score(y, p1, ok1)
				refs[2].score(y, p2, ok2)
				refs[3].score(y, p3, ok3)
				hist[key] = append(h, refRow{q, y})
				events++
			}
			path := filepath.Join(t.TempDir(), "history.ndjson")
			if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")+"\n"), 0o600); err != nil {
				t.Fatal(err)
			}
			args := []string{"--history", path, "--json"}
			for _, s := range specs {
				args = append(args, "--learner", s)
			}
			var stdout, stderr bytes.Buffer
			if code := run(append([]string{"replay"}, args...), &stdout, &stderr); code != 0 {
				t.Fatalf("exit %d: %s", code, stderr.String())
			}
			var out replayOutput
			if err := json.Unmarshal(stdout.Bytes(), &out); err != nil {
				t.Fatalf("%v\n%s", err, stdout.String())
			}
			if out.Events != events || out.Rejected != len(badLines) {
				t.Errorf("events %d rejected %d, want %d and %d", out.Events, out.Rejected, events, len(badLines))
			}
			for _, n := range badLines {
				if want := fmt.Sprintf("line %d: ", n); !strings.Contains(stderr.String(), want+"invalid event: target is missing") {
					t.Errorf("stderr does not name %q:\n%s", want, stderr.String())
				}
			}
			for i, l := range out.Learners {
				r := refs[i]
				n := float64(r.scored)
				if l.Name != specs[i] || l.Scored != r.scored || l.Unscored != r.unscored {
					t.Errorf("%s: scored %d unscored %d, reference %d %d", l.Name, l.Scored, l.Unscored, r.scored, r.unscored)
					continue
				}
				for _, c := range []struct {
					what      string
					got, want float64
				}{
					{"mae", *l.MAE, r.sumAbs / n}, {"rmse", *l.RMSE, math.Sqrt(r.sumSq / n)}, {"bias", *l.Bias, r.sumErr / n},
				} {
					if math.Abs(c.got-c.want) > refTol*math.Max(1, math.Abs(c.want)) {
						t.Errorf("%s %s = %.15g, reference %.15g", l.Name, c.what, c.got, c.want)
					}
				}
			}
		})
	}
}

func TestReplayStrictAndUsage(t *testing.T) {
	path := filepath.Join(t.TempDir(), "h.ndjson")
	os.WriteFile(path, []byte("{\"features\":{\"a\":1},\"target\":1}\nnot json\n{\"features\":{\"a\":2},\"target\":2}\n"), 0o600)
	cases := []struct {
		args []string
		code int
		says string
	}{
		{[]string{"replay", "--history", path, "--learner", "mean", "--strict"}, 2, "line 2"},
		{[]string{"replay", "--history", path}, 2, "--learner"},
		{[]string{"replay", "--learner", "mean"}, 2, "--history"},
		{[]string{"replay", "--history", path, "--learner", "knn:k=0"}, 2, "k=0"},
		{[]string{"replay", "--history", filepath.Join(t.TempDir(), "missing"), "--learner", "mean"}, 2, "no such file"},
		{[]string{"replay", "--history", path, "--learner", "mean", "--json"}, 0, ""},
		{[]string{"replay", "--learner", "mean", "--history", path, "--no-such-flag"}, 2, "no-such-flag"},
		{[]string{"nonsense"}, 2, "unknown command"},
	}
	for _, c := range cases {
		var stdout, stderr bytes.Buffer
		code := run(c.args, &stdout, &stderr)
		if code != c.code || !strings.Contains(stderr.String(), c.says) {
			t.Errorf("%v: exit %d (want %d), stderr %q (want it to mention %q)", c.args, code, c.code, stderr.String(), c.says)
		}
	}
}

func TestDemoRuns(t *testing.T) {
	var stdout, stderr bytes.Buffer
	if code := run([]string{"demo", "--listen", "127.0.0.1:0", "--days", "2", "--speed", "1000000"}, &stdout, &stderr); code != 0 {
		t.Fatalf("exit %d: %s", code, stderr.String())
	}
	for _, want := range []string{"knn-week", "rls-forget", "sliding-rls-3d", "mean-day", "recent error"} {
		if !strings.Contains(stdout.String(), want) {
			t.Errorf("demo output lacks %q:\n%s", want, stdout.String())
		}
	}
}

// TestReplaySweep: a swept spec on the command line expands into one learner
// per combination, each scoring exactly as the same spec given alone.
func TestReplaySweep(t *testing.T) {
	path, _ := writeHistory(t, 1)
	var sweep, alone replayOutput
	json.Unmarshal([]byte(mustRun(t, "replay", "--history", path, "--json", "--learner", "knn:k=2..4,window=100|200", "--learner", "rls:forget=0.99|1")), &sweep)
	json.Unmarshal([]byte(mustRun(t, "replay", "--history", path, "--json", "--learner", "knn:k=3,window=200")), &alone)
	if len(sweep.Learners) != 8 {
		t.Fatalf("%d learners, want 3×2 + 2", len(sweep.Learners))
	}
	for _, l := range sweep.Learners {
		if l.Name == "knn:k=3,window=200" {
			a := alone.Learners[0]
			if l.Scored != a.Scored || *l.MAE != *a.MAE || *l.RMSE != *a.RMSE || *l.Bias != *a.Bias {
				t.Errorf("sweep member %+v, alone %+v", l, a)
			}
			return
		}
	}
	t.Error("knn:k=3,window=200 is not among the sweep's learners")
}

// TestReplayFormatsAgree: the demo scenario written as NDJSON, as CSV, as
// gzip-compressed CSV, as CSV with its times in epoch milliseconds under
// another column name, as Parquet, and as NDJSON renamed and nested (read
// through a field mapping, epoch-millisecond times) gives the same `replay
// --json` report, to the byte; bad rows are named by row number.
func TestReplayFormatsAgree(t *testing.T) {
	dir := t.TempDir()
	nd, csvPath, pqPath := filepath.Join(dir, "w.ndjson"), filepath.Join(dir, "w.csv"), filepath.Join(dir, "w.parquet")
	for _, out := range []string{nd, csvPath, pqPath} {
		if code := run([]string{"synth", "--out", out, "--days", "3"}, io.Discard, io.Discard); code != 0 {
			t.Fatalf("synth %s: exit %d", out, code)
		}
	}
	// The same rows with the time as epoch milliseconds in a column "ts".
	raw, err := os.ReadFile(csvPath)
	if err != nil {
		t.Fatal(err)
	}
	r := csv.NewReader(bytes.NewReader(raw))
	r.FieldsPerRecord = -1
	recs, err := r.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var ms bytes.Buffer
	w := csv.NewWriter(&ms)
	for i, rec := range recs {
		rec = slices.Clone(rec)
		switch {
		case i == 0:
			rec[0] = "ts"
		case len(rec) == len(recs[0]):
			tm, err := time.Parse(time.RFC3339, rec[0])
			if err != nil {
				t.Fatal(err)
			}
			rec[0] = strconv.FormatInt(tm.UnixMilli(), 10)
		}
		w.Write(rec)
	}
	w.Flush()
	msPath := filepath.Join(dir, "w-ms.csv")
	gzPath := filepath.Join(dir, "w.csv.gz")
	var gz bytes.Buffer
	zw := gzip.NewWriter(&gz)
	zw.Write(raw)
	zw.Close()
	if os.WriteFile(msPath, ms.Bytes(), 0o600) != nil || os.WriteFile(gzPath, gz.Bytes(), 0o600) != nil {
		t.Fatal("write")
	}
	replayJSON := func(args ...string) (string, string) {
		var out, errOut bytes.Buffer
		args = append([]string{"replay", "--json", "--quiet", "--learner", "rls:forget=0.995", "--learner", "knn:k=5,window=500", "--learner", "mean:window=100"}, args...)
		if code := run(args, &out, &errOut); code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, errOut.String())
		}
		return out.String(), errOut.String()
	}
	want, _ := replayJSON("--history", nd)
	for _, args := range [][]string{{"--history", csvPath}, {"--history", gzPath}, {"--history", msPath, "--time-field", "ts", "--time-format", "unix_ms"}} {
		got, log := replayJSON(args...)
		if got != want {
			t.Errorf("%v: the report differs from the NDJSON one:\n%.400s\nwant\n%.400s", args, got, want)
		}
		if !strings.Contains(log, "row 436: bad row: wrong number of fields (line 437 of the file)") {
			t.Errorf("%v: the bad row is not named by its row: %s", args, log)
		}
	}
	// The NDJSON renamed and nested: {"ts": epoch ms, "device_id", "kwh",
	// "readings": {features}}, read through a mapping.
	lines := bytes.Split(bytes.TrimSpace(mustRead(t, nd)), []byte("\n"))
	var mapped bytes.Buffer
	for _, l := range lines {
		var ev struct {
			Time     string                     `json:"time"`
			Key      string                     `json:"key"`
			Features map[string]json.RawMessage `json:"features"`
			Target   json.RawMessage            `json:"target"`
		}
		if json.Unmarshal(l, &ev) != nil || ev.Time == "" {
			mapped.Write(l) // the scenario's broken lines stay broken
			mapped.WriteByte('\n')
			continue
		}
		tm, _ := time.Parse(time.RFC3339, ev.Time)
		feats, _ := json.Marshal(ev.Features)
		fmt.Fprintf(&mapped, `{"device_id":%q,"readings":%s,"ts":%d`, ev.Key, feats, tm.UnixMilli())
		if ev.Target != nil {
			fmt.Fprintf(&mapped, `,"kwh":%s`, ev.Target)
		}
		mapped.WriteString("}\n")
	}
	mappedPath := filepath.Join(dir, "w-mapped.ndjson")
	if err := os.WriteFile(mappedPath, mapped.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
	if got, log := replayJSON("--history", mappedPath, "--time-field", "ts", "--time-format", "unix_ms", "--key-field", "device_id",
		"--target-field", "kwh", "--features-from", "readings"); got != want {
		t.Errorf("NDJSON through a mapping: the report differs from the NDJSON one:\n%.400s\nwant\n%.400s\n%s", got, want, log)
	}
	if got, log := replayJSON("--history", pqPath); got != want {
		t.Errorf("Parquet: the report differs from the NDJSON one:\n%.400s\nwant\n%.400s", got, want)
	} else if !strings.Contains(log, "row 436: invalid event: target is missing") {
		t.Errorf("Parquet: the broken row is not named by its row: %s", log)
	}
}

func mustRead(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}
