package learner

import (
	"errors"
	"strings"
	"testing"
)

func TestExpandSpec(t *testing.T) {
	tests := []struct {
		text  string
		names []string
	}{
		{"knn:k=1..3,window=2000", []string{"knn:k=1,window=2000", "knn:k=2,window=2000", "knn:k=3,window=2000"}},
		{"rls:forget=0.99|0.995|1", []string{"rls:forget=0.99", "rls:forget=0.995", "rls:forget=1"}},
		{"knn:k=1..2,weight=equal|inverse", []string{"knn:k=1,weight=equal", "knn:k=1,weight=inverse", "knn:k=2,weight=equal", "knn:k=2,weight=inverse"}},
		{"mean:window=100", []string{"mean:window=100"}},
		{"knn", []string{"knn"}},
	}
	for _, tc := range tests {
		specs, err := ExpandSpec(tc.text)
		if err != nil {
			t.Errorf("%s: %v", tc.text, err)
			continue
		}
		var names []string
		for _, s := range specs {
			names = append(names, s.Name)
		}
		if strings.Join(names, " ") != strings.Join(tc.names, " ") {
			t.Errorf("%s: %v, want %v", tc.text, names, tc.names)
		}
	}
	if s, _ := ExpandSpec("knn:k=1..30"); len(s) != 30 || s[29].KNN.K != 30 {
		t.Errorf("k=1..30 expanded to %d learners", len(s))
	}
}

func TestExpandSpecErrors(t *testing.T) {
	for _, tc := range []struct{ text, says string }{
		{"knn:k=5..1", "empty"},
		{"knn:k=a..3", "LO..HI with integers"},
		{"knn:k=1..5000", "more than 1000"},
		{"knn:k=1..40,window=1..40", "more than 1000 learners"},
		{"rls:forget=0.9||1", "empty alternative"},
		{"rls:forget=0.9|2", "forget=2"},
		{"knn:k=1..3,name=x", "name= cannot"},
		{"knn:k", "PARAM=VALUE"},
	} {
		_, err := ExpandSpec(tc.text)
		if !errors.Is(err, ErrInvalidSpec) || !strings.Contains(err.Error(), tc.says) {
			t.Errorf("%s: %v, want ErrInvalidSpec saying %q", tc.text, err, tc.says)
		}
	}
}

// TestSweepMemberScoresAsAlone: a learner inside a sweep scores exactly as
// the same spec run alone (learners never share state).
func TestSweepMemberScoresAsAlone(t *testing.T) {
	specs, err := ExpandSpec("knn:k=2..4,window=100|300")
	if err != nil {
		t.Fatal(err)
	}
	all, _ := NewEngine(Config{Learners: specs})
	alone := mustEngine(t, Config{}, "knn:k=3,window=300")
	for i, ev := range stream(1500, 21) {
		all.Apply(Position{0, int64(i)}, ev)
		alone.Apply(Position{0, int64(i)}, ev)
	}
	var member LearnerReport
	for _, l := range all.Report(true).Learners {
		if l.Name == "knn:k=3,window=300" {
			member = l
		}
	}
	if got, want := mustJSON(t, member), mustJSON(t, alone.Report(true).Learners[0]); got != want {
		t.Errorf("sweep member\n%s\nalone\n%s", got, want)
	}
}
