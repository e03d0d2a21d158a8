package replay

import (
	"fmt"
	"io"
	"math"
	"slices"
	"text/tabwriter"
	"time"

	"tidemark/learner"
)

// WriteTable prints a report as a table, learners sorted by their recent
// (windowed) RMSE, best first; learners that scored nothing come last.
func WriteTable(w io.Writer, r learner.Report) error {
	ls := slices.Clone(r.Learners)
	recent := func(l learner.LearnerReport) float64 {
		if l.Recent.RMSE == nil {
			return math.Inf(1)
		}
		return *l.Recent.RMSE
	}
	slices.SortStableFunc(ls, func(a, b learner.LearnerReport) int {
		ra, rb := recent(a), recent(b)
		switch {
		case ra < rb:
			return -1
		case ra > rb:
			return 1
		}
		return 0
	})
	fmt.Fprintf(w, "%d events applied, %d rejected, %d keys\n\n", r.Events, r.Rejected, r.Keys)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "learner\tscored\tunscored\tmae\trmse\tbias\trecent mae\trecent rmse\tskill\theld: conformal\tnormal\tdrift\talarms\t")
	for _, l := range ls {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%d\t\n", l.Name, l.Scored, l.Unscored,
			num(l.MAE), num(l.RMSE), num(l.Bias), num(l.Recent.MAE), num(l.Recent.RMSE), num(l.Skill),
			num(l.Conformal.Coverage), num(l.Coverage), l.Drift.State, l.Drift.Alarms)
	}
	if ld := r.Leader; ld != nil {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%d\t\n", "leader (per key)", ld.Scored, ld.Unscored,
			num(ld.MAE), num(ld.RMSE), num(ld.Bias), num(ld.Recent.MAE), num(ld.Recent.RMSE), "–",
			num(ld.Conformal.Coverage), num(ld.Coverage), fmt.Sprintf("%d switches", ld.Switches), 0)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	for _, l := range ls {
		if len(l.Keys) == 0 {
			continue
		}
		fmt.Fprintf(w, "\n%s, per key\n", l.Name)
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "key\tscored\tunscored\tmae\trmse\tbias\trecent rmse\tskill\tdrift\t")
		for _, k := range l.Keys {
			fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%s\t%s\t%s\t\n", k.Key, k.Scored, k.Unscored,
				num(k.MAE), num(k.RMSE), num(k.Bias), num(k.Recent.RMSE), num(k.Skill), k.Drift)
		}
		if err := tw.Flush(); err != nil {
			return err
		}
	}
	if err := writeServed(w, r); err != nil {
		return err
	}
	level := 0.0
	if len(ls) > 0 {
		level = ls[0].Conformal.Level
	}
	_, err := fmt.Fprintf(w, "\nrecent = the last %d scored events; skill = 1 − rmse/rmse(first mean learner); held = the share of\n"+
		"intervals (nominal %g) that held the target, conformal and normal approximation.\n"+
		"Look at a learner's recent error before acting on its predictions.\n", r.RecentWindow, level)
	return err
}

// writeServed prints the served answers' scores beside the prequential
// ones, when any answer was served.
func writeServed(w io.Writer, r learner.Report) error {
	s := r.Served
	if s == nil {
		return nil
	}
	fmt.Fprintf(w, "\nanswers as served, scored when their labels came (%d still waiting, %d expired, %d dropped for room)\n",
		s.Pending, s.Expired, s.Evicted)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "learner	answers	labelled	served rmse	prequential rmse	served mae	held	mean delay	")
	rows := slices.Clone(s.Learners)
	if s.Leader != nil {
		rows = append(rows, *s.Leader)
	}
	for _, m := range rows {
		pre := "–"
		for _, l := range r.Learners {
			if l.Name == m.Name {
				pre = num(l.RMSE)
			}
		}
		if m.Name == learner.LeaderName && r.Leader != nil {
			pre = num(r.Leader.RMSE)
		}
		delay := "–"
		if m.Delay.MeanSeconds != nil {
			delay = time.Duration(*m.Delay.MeanSeconds * float64(time.Second)).Round(time.Second).String()
		}
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%s\t%s\t\n", m.Name, m.Answers, m.Labelled, num(m.RMSE), pre, num(m.MAE), num(m.Coverage), delay)
	}
	return tw.Flush()
}

func num(p *float64) string {
	if p == nil {
		return "–"
	}
	return fmt.Sprintf("%.4g", *p)
}
