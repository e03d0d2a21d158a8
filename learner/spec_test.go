package learner

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"
)

func TestParseSpec(t *testing.T) {
	tests := []struct {
		text  string
		name  string
		canon string
	}{
		{"knn", "knn", "knn:k=10,window=1000,weight=equal,scale=zscore,max=100000"},
		{"knn:k=5,window=6h", "knn:k=5,window=6h", "knn:k=5,window=6h0m0s,weight=equal,scale=zscore,max=100000"},
		{"knn:k=3,window=all,weight=inverse,scale=none,name=near", "near", "knn:k=3,window=all,weight=inverse,scale=none,max=100000"},
		{"rls:forget=0.995", "rls:forget=0.995", "rls:forget=0.995,p0=1e+06,intercept=true,degree=1"},
		{"rls:half_life=12h,degree=2", "rls:half_life=12h,degree=2", "rls:half_life=12h0m0s,p0=1e+06,intercept=true,degree=2"},
		{"rls:p0=inf,intercept=false", "rls:p0=inf,intercept=false", "rls:forget=1,p0=inf,intercept=false,degree=1"},
		{"sliding-rls:window=500", "sliding-rls:window=500", "sliding-rls:window=500,intercept=true,degree=1,max=100000"},
		{"sliding-rls:window=7d", "sliding-rls:window=7d", "sliding-rls:window=7d,intercept=true,degree=1,max=100000"},
		{"mean:window=100", "mean:window=100", "mean:window=100,max=100000"},
		{"mean", "mean", "mean:window=all,max=100000"},
	}
	for _, tc := range tests {
		s, err := ParseSpec(tc.text)
		if err != nil {
			t.Errorf("%s: %v", tc.text, err)
			continue
		}
		if s.Name != tc.name || s.Canonical() != tc.canon {
			t.Errorf("%s: name %q canonical %q; want %q %q", tc.text, s.Name, s.Canonical(), tc.name, tc.canon)
		}
	}
	if s, _ := ParseSpec("rls:p0=inf"); !math.IsInf(s.RLS.P0, 1) {
		t.Errorf("p0=inf parsed as %v", s.RLS.P0)
	}
	if s, _ := ParseSpec("knn:window=6h"); s.KNN.Window.Span != 6*time.Hour || !s.NeedsTime() {
		t.Errorf("window=6h parsed as %+v", s.KNN.Window)
	}
}

func TestParseSpecErrors(t *testing.T) {
	tests := []struct {
		text string
		says []string // the error must name these
	}{
		{"tree", []string{`"tree"`, "knn, rls, sliding-rls or mean"}},
		{"knn:k=0", []string{"k=0", "1 to 10000"}},
		{"knn:k=abc", []string{"k=abc"}},
		{"knn:depth=3", []string{`"depth"`, "allowed: k, window"}},
		{"knn:window=-5", []string{"window=-5"}},
		{"knn:weight=heavy", []string{"weight=heavy", "equal or inverse"}},
		{"knn:scale=minmax", []string{"scale=minmax", "zscore or none"}},
		{"rls:forget=1.5", []string{"forget=1.5", "(0, 1]"}},
		{"rls:forget=0", []string{"forget=0"}},
		{"rls:forget=0.9,half_life=1h", []string{"exclude each other"}},
		{"rls:p0=-1", []string{"p0=-1", "positive number or inf"}},
		{"rls:degree=3", []string{"degree=3", "1 to 2"}},
		{"rls:intercept=maybe", []string{"intercept=maybe", "true or false"}},
		{"sliding-rls:window=all", []string{"window=all", "rls:forget=1"}},
		{"mean:window=0", []string{"window=0"}},
		{"knn:k", []string{"PARAM=VALUE"}},
		{"knn:k=1,k=2", []string{"given twice"}},
		{"knn:name=", []string{"name="}},
	}
	for _, tc := range tests {
		_, err := ParseSpec(tc.text)
		if !errors.Is(err, ErrInvalidSpec) {
			t.Errorf("%s: error %v, want ErrInvalidSpec", tc.text, err)
			continue
		}
		for _, s := range tc.says {
			if !strings.Contains(err.Error(), s) {
				t.Errorf("%s: error %q does not mention %q", tc.text, err, s)
			}
		}
	}
}

func TestDecodeEvent(t *testing.T) {
	var ev Event
	line := `{"time":"2026-03-02T14:00:00Z","key":"room-b","features":{"outdoor_c":21.5,"door_min":3,"shift":"night"},"target":41.7}`
	if err := DecodeEvent([]byte(line), &ev); err != nil {
		t.Fatal(err)
	}
	want := time.Date(2026, 3, 2, 14, 0, 0, 0, time.UTC).UnixNano()
	if !ev.HasTime || ev.Time != want || ev.Key != "room-b" || ev.Target != 41.7 || len(ev.Features) != 3 {
		t.Fatalf("decoded %+v", ev)
	}
	if ev.Features[0].Name != "door_min" || ev.Features[1].Name != "outdoor_c" || !ev.Features[2].IsStr || ev.Features[2].Str != "night" {
		t.Errorf("features not sorted by name or mistyped: %+v", ev.Features)
	}

	bad := []struct{ line, says string }{
		{`not json`, "not a JSON object"},
		{`{"features":{}}`, "target is missing"},
		{`{"target":null}`, "target is missing"},
		{`{"target":"12"}`, "want a number"},
		{`{"target":1e400}`, "not a finite number"},
		{`{"target":1e60}`, "not a finite number"},
		{`{"target":1,"features":{"a":true}}`, `feature "a"`},
		{`{"target":1,"features":{"a":null}}`, `feature "a"`},
		{`{"target":1,"features":{"a":[1]}}`, `feature "a"`},
		{`{"target":1,"time":"yesterday"}`, "not RFC 3339"},
		{`{"target":1,"key":7}`, "key must be a string"},
		{`{"target":1,"key":"` + strings.Repeat("k", 300) + `"}`, "key is 300 bytes"},
		{`{"target":1`, "not valid JSON"},
	}
	for _, b := range bad {
		err := DecodeEvent([]byte(b.line), &ev)
		if !errors.Is(err, ErrInvalidEvent) || !strings.Contains(err.Error(), b.says) {
			t.Errorf("%s: error %v, want ErrInvalidEvent saying %q", b.line, err, b.says)
		}
	}
	if err := DecodeEvent(make([]byte, MaxEventBytes+1), &ev); !errors.Is(err, ErrInvalidEvent) {
		t.Errorf("oversized event: %v", err)
	}
}

func TestSchemaVector(t *testing.T) {
	cfg := FeatureConfig{HashBuckets: 4, TimeFeatures: true}
	var first Event
	_ = DecodeEvent([]byte(`{"time":"2026-03-01T06:00:00Z","features":{"b":2,"a":1,"c":"x"},"target":0}`), &first)
	s := SchemaOf(&first, cfg)
	if s.Dim() != 2+4+4 {
		t.Fatalf("dim %d, want 10 (2 numeric, 4 buckets, 4 time)", s.Dim())
	}
	x := make([]float64, s.Dim())
	if _, err := s.Vector(x, &first); err != nil {
		t.Fatal(err)
	}
	// 2026-03-01 is a Sunday (weekday 0); 06:00 is a quarter of a day:
	// hour sin/cos = sin(π/2), cos(π/2) = 1, 0; weekday angle 2π·0.25/7.
	if x[0] != 1 || x[1] != 2 || math.Abs(x[6]-1) > 1e-15 || math.Abs(x[7]) > 1e-15 ||
		math.Abs(x[8]-math.Sin(2*math.Pi*0.25/7)) > 1e-15 {
		t.Errorf("vector %v", x)
	}
	var hot float64
	for _, v := range x[2:6] {
		hot += v
	}
	if hot != 1 {
		t.Errorf("one-hot buckets sum to %v, want 1", hot)
	}
	cases := []struct{ line, says string }{
		{`{"time":"2026-03-01T06:00:00Z","features":{"a":1,"c":"x"},"target":0}`, `feature "b" is missing`},
		{`{"time":"2026-03-01T06:00:00Z","features":{"a":"1","b":2,"c":"x"},"target":0}`, `"a" must be a number`},
		{`{"time":"2026-03-01T06:00:00Z","features":{"a":1,"b":2,"c":3},"target":0}`, `"c" must be a string`},
		{`{"features":{"a":1,"b":2,"c":"x"},"target":0}`, "time is missing"},
		{`{"time":"2026-03-01T06:00:00Z","features":{"b":2,"c":"x"},"target":0}`, `feature "a" is missing`},
	}
	for _, c := range cases {
		var ev Event
		if err := DecodeEvent([]byte(c.line), &ev); err != nil {
			t.Fatal(err)
		}
		_, err := s.Vector(x, &ev)
		if !errors.Is(err, ErrRejected) || !strings.Contains(err.Error(), c.says) {
			t.Errorf("%s: %v, want ErrRejected saying %q", c.line, err, c.says)
		}
	}
	var extra Event
	_ = DecodeEvent([]byte(`{"time":"2026-03-01T06:00:00Z","features":{"a":1,"aa":5,"b":2,"c":"x","z":1},"target":0}`), &extra)
	if n, err := s.Vector(x, &extra); err != nil || n != 2 {
		t.Errorf("extra features: ignored %d err %v, want 2 and nil", n, err)
	}
}

func ExampleParseSpec() {
	s, _ := ParseSpec("knn:k=5,window=6h,name=near")
	fmt.Println(s.Name, s.Kind, s.KNN.K, s.KNN.Window, s.NeedsTime())
	_, err := ParseSpec("rls:forget=2")
	fmt.Println(err)
	// Output:
	// near knn 5 6h0m0s true
	// learner: invalid spec: spec "rls:forget=2": forget=2: want a number in (0, 1]
}
