package learner

import (
	"bufio"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// strdSet is one NIST StRD linear least-squares dataset from testdata/strd
// (the files and their sources are listed in testdata/README.md).
type strdSet struct {
	name      string
	rows      [][]float64 // regressors without the intercept
	y         []float64
	certified []float64 // B0 (intercept) first
}

// readSTRD reads testdata/strd/NAME.dat. A polynomial model's regressors are
// x, x·x, x·x·x, … by repeated multiplication, exactly as lapack_lre.py
// builds them, so that both solve the same floating-point problem.
func readSTRD(t *testing.T, name string) strdSet {
	t.Helper()
	f, err := os.Open(filepath.Join("..", "testdata", "strd", name+".dat"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	s := strdSet{name: name}
	kind, k := "", 0
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		fields := strings.Fields(sc.Text())
		if len(fields) == 0 || strings.HasPrefix(fields[0], "#") {
			continue
		}
		switch fields[0] {
		case "model":
			kind = fields[1]
			k, _ = strconv.Atoi(fields[2])
			continue
		case "certified":
			s.certified = parseFloats(t, fields[1:])
			continue
		}
		v := parseFloats(t, fields)
		s.y = append(s.y, v[0])
		if kind == "polynomial" {
			row := make([]float64, k)
			p := 1.0
			for j := range row {
				p *= v[1]
				row[j] = p
			}
			s.rows = append(s.rows, row)
		} else {
			s.rows = append(s.rows, v[1:])
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	if len(s.certified) != len(s.rows[0])+1 {
		t.Fatalf("%s: %d certified values for %d regressors", name, len(s.certified), len(s.rows[0])+1)
	}
	return s
}

func parseFloats(t *testing.T, fields []string) []float64 {
	t.Helper()
	out := make([]float64, len(fields))
	for i, f := range fields {
		v, err := strconv.ParseFloat(f, 64)
		if err != nil {
			t.Fatal(err)
		}
		out[i] = v
	}
	return out
}

// lapackLRE reads the minimum LRE that LAPACK's Householder QR (numpy) reaches
// on each set, as testdata/strd/lapack_lre.py recorded it in lapack_lre.txt.
func lapackLRE(t *testing.T) map[string]float64 {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "testdata", "strd", "lapack_lre.txt"))
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]float64{}
	for _, line := range strings.Split(string(b), "\n") {
		f := strings.Fields(line)
		if len(f) >= 3 && f[1] == "qr" {
			v, err := strconv.ParseFloat(f[2], 64)
			if err != nil {
				t.Fatal(err)
			}
			out[f[0]] = v
		}
	}
	return out
}

// TestSTRDLinearLeastSquares feeds every NIST StRD linear least-squares set
// one row at a time to rls:p0=inf (no prior, cumulative) and to sliding-rls
// with a window holding the whole set, and requires of every coefficient a
// log relative error at least LAPACK QR's minimum on the same data minus one
// digit (the rule; LAPACK's figures in testdata/strd/lapack_lre.txt).
func TestSTRDLinearLeastSquares(t *testing.T) {
	floor := lapackLRE(t)
	for _, name := range []string{"norris", "pontius", "longley", "filip", "wampler1", "wampler2", "wampler3", "wampler4", "wampler5"} {
		s := readSTRD(t, name)
		ref, ok := floor[name]
		if !ok {
			t.Fatalf("%s: no LAPACK figure in lapack_lre.txt", name)
		}
		want := ref - 1
		for _, spec := range []string{"rls:p0=inf", fmt.Sprintf("sliding-rls:window=%d", len(s.y))} {
			sp, err := ParseSpec(spec)
			if err != nil {
				t.Fatal(err)
			}
			m := New(&sp, len(s.rows[0]))
			for i, row := range s.rows {
				m.Learn(row, s.y[i], 0)
			}
			got := m.(Coefficients).Coefficients(nil)
			worst := math.Inf(1)
			var each []string
			for i, c := range s.certified {
				l := lre(got[i], c)
				worst = math.Min(worst, l)
				each = append(each, fmt.Sprintf("%.2f", l))
			}
			t.Logf("%-9s %-22s min LRE %5.2f (LAPACK QR %5.2f): %s", name, spec, worst, ref, strings.Join(each, " "))
			if !(worst >= want) {
				t.Errorf("%s %s: minimum LRE %.2f < %.2f (LAPACK QR %.2f minus one digit)", name, spec, worst, want, ref)
			}
		}
	}
}
