package api

import (
	"fmt"
	"html/template"
	"math"
	"net/http"
	"strings"

	"github.com/labstack/echo/v4"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// The dashboard: one server-rendered page (no script) that refreshes itself,
// showing every learner's recent error with a sparkline of its curve, its
// drift state, and the newest checkpoints. It reads the published snapshot
// like every other handler.
var dashboardPage = template.Must(template.New("dashboard").Funcs(template.FuncMap{"num": dashNum}).Parse(`<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta http-equiv="refresh" content="5">
<title>tidemark</title>
<style>
body{font:14px/1.4 system-ui,sans-serif;margin:2em;color:#222;max-width:1100px}
table{border-collapse:collapse;margin:1em 0}th,td{padding:.3em .8em;text-align:right;border-bottom:1px solid #ddd}
th:first-child,td:first-child{text-align:left}.warning{color:#b35c00}.drift{color:#b30000;font-weight:bold}
.note{background:#f6f6f0;padding:.6em 1em;border-left:4px solid #e69f00}code{background:#eee;padding:0 .3em}
</style></head><body>
<h1>tidemark</h1>
<p class="note">Predictions steer decisions: look at a learner's recent error before acting on what it predicts.
tidemark is not a safety system.</p>
<p>{{.Report.Events}} events applied · {{.Report.Rejected}} rejected · {{.Report.Skipped}} skipped · {{.Report.Keys}} keys ·
{{if .Ready}}ready{{else}}<span class="warning">catching up</span>{{end}} · checkpoint {{.Checkpoint}}</p>
<table><tr><th>learner</th><th>kind</th><th>scored</th><th>recent rmse</th><th>recent mae</th><th>rmse</th><th>skill</th><th>drift</th><th>alarms</th><th>recent rmse over time</th></tr>
{{range .Rows}}<tr><td>{{.Name}}</td><td>{{.Kind}}</td><td>{{.Scored}}</td><td>{{num .RecentRMSE}}</td><td>{{num .RecentMAE}}</td><td>{{num .RMSE}}</td><td>{{num .Skill}}</td>
<td class="{{.Drift}}">{{.Drift}}</td><td>{{.Alarms}}</td><td>{{.Spark}}</td></tr>
{{end}}</table>
<h2>Checkpoints</h2>
<table><tr><th>version</th><th>created</th><th>reason</th><th>events</th><th>bytes</th><th>pinned</th></tr>
{{range .Checkpoints}}<tr><td>{{.Version}}</td><td>{{.Created.Format "2006-01-02 15:04:05"}}</td><td>{{.Reason}}</td><td>{{.Events}}</td><td>{{.Bytes}}</td><td>{{if .Pinned}}pinned{{end}}</td></tr>
{{end}}</table>
<p>JSON: <a href="/v1/learners">/v1/learners</a> · <a href="/v1/checkpoints">/v1/checkpoints</a> · <a href="/metrics">/metrics</a> ·
<a href="/v1/openapi.json">/v1/openapi.json</a></p>
</body></html>
`))

type dashRow struct {
	Name, Kind, Drift                  string
	Scored, Alarms                     int64
	RecentRMSE, RecentMAE, RMSE, Skill *float64
	Spark                              template.HTML
}

func dashNum(p *float64) string {
	if p == nil {
		return "–"
	}
	return fmt.Sprintf("%.4g", *p)
}

func (s *Service) handleDashboard(c echo.Context) error {
	snap := s.snap.Load()
	data := struct {
		Report      learner.Report
		Ready       bool
		Checkpoint  uint64
		Rows        []dashRow
		Checkpoints []checkpoint.Info
	}{Report: snap.state.report, Ready: snap.ready && snap.fault == nil, Checkpoint: snap.state.ckVersion}
	for _, l := range snap.state.report.Learners {
		pts, _ := s.curves.get(l.Name)
		data.Rows = append(data.Rows, dashRow{Name: l.Name, Kind: l.Kind, Drift: l.Drift.State, Scored: l.Scored, Alarms: l.Drift.Alarms,
			RecentRMSE: l.Recent.RMSE, RecentMAE: l.Recent.MAE, RMSE: l.RMSE, Skill: l.Skill, Spark: sparkline(pts)})
	}
	// The listing travels in the snapshot: a refresh reads no file.
	for i := len(snap.checkpoints) - 1; i >= 0 && len(data.Checkpoints) < 10; i-- {
		if snap.checkpoints[i].Error == "" {
			data.Checkpoints = append(data.Checkpoints, snap.checkpoints[i])
		}
	}
	var b strings.Builder
	if err := dashboardPage.Execute(&b, data); err != nil {
		return err
	}
	return c.HTML(http.StatusOK, b.String())
}

// sparkline draws a curve's recent RMSE as a small inline SVG polyline.
func sparkline(pts []CurvePoint) template.HTML {
	const w, h = 240.0, 36.0
	var ys []float64
	for _, p := range pts {
		if p.RMSE != nil {
			ys = append(ys, *p.RMSE)
		}
	}
	if len(ys) < 2 {
		return ""
	}
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, y := range ys {
		lo, hi = math.Min(lo, y), math.Max(hi, y)
	}
	if hi == lo {
		hi = lo + 1
	}
	var b strings.Builder
	fmt.Fprintf(&b, `<svg width="%g" height="%g" viewBox="0 0 %g %g" role="img" aria-label="recent RMSE from %.3g to %.3g"><polyline fill="none" stroke="#0072b2" stroke-width="1.5" points="`, w, h, w, h, lo, hi)
	for i, y := range ys {
		fmt.Fprintf(&b, "%.1f,%.1f ", float64(i)/float64(len(ys)-1)*w, h-2-(y-lo)/(hi-lo)*(h-4))
	}
	b.WriteString(`"/></svg>`)
	return template.HTML(b.String())
}
