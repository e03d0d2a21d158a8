// Package chart records a replay's error curves and draws them: a CSV of
// each learner's recent error per bucket of events, and a two-panel plot
// (error over time with drift alarms; prediction against target for the best
// learner over the last part of the stream). It reads the engine only
// through its reports and last predictions; it holds no model math.
package chart

import (
	"bufio"
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"tidemark/learner"
	"tidemark/window"
)

// DefaultEvery is the number of applied events per curve row: fine enough
// that a burst of a few hours shows (the demo scenario has 36 events an
// hour).
const DefaultEvery = 50

// MaxRows bounds the curve: past it every other row is dropped and the
// events per row doubled, so that a long history keeps its whole curve in
// bounded memory.
const MaxRows = 5000

// DefaultTail is how many of the plotted key's last events the prediction
// panel shows.
const DefaultTail = 864

// Row is one bucket of the curve: after the event at Line (and Time), each
// learner's error over its keys' recent windows.
type Row struct {
	Line   int64
	Time   int64 // Unix ns; 0 without event times
	Events int64
	MAE    []float64 // NaN before a learner has scored
	RMSE   []float64
}

// Alarm is a drift alarm of one learner.
type Alarm struct {
	Learner int
	Line    int64
	Time    int64
}

type point struct {
	line   int64
	time   int64
	target float64
	pred   []float64 // NaN where a learner did not predict
}

// Recorder collects curves, alarms and the plotted key's predictions. Use
// its Observe as api.ReplayConfig.Observe. Not safe for concurrent use.
type Recorder struct {
	Every   int64  // events per row. Default: DefaultEvery.
	Key     string // the key whose predictions are plotted; default: the first key seen
	keySet  bool
	names   []string
	rows    []Row
	alarms  []Alarm
	last    []int64 // each learner's alarm count at the previous event
	tail    *window.Ring[point]
	applied int64
	hasTime bool
}

// NewRecorder returns a recorder for the engine's learners.
func NewRecorder(eng *learner.Engine, every int64, key string) *Recorder {
	if every <= 0 {
		every = DefaultEvery
	}
	r := &Recorder{Every: every, Key: key, keySet: key != "", tail: window.NewRing[point](DefaultTail)}
	for _, s := range eng.Config().Learners {
		r.names = append(r.names, s.Name)
	}
	r.last = make([]int64, len(r.names))
	return r
}

// Observe records one applied event.
func (r *Recorder) Observe(line int64, ev *learner.Event, eng *learner.Engine) {
	r.applied++
	r.hasTime = r.hasTime || ev.HasTime
	for i := range r.names {
		if a := eng.LearnerAlarms(i); a != r.last[i] {
			r.last[i] = a
			r.alarms = append(r.alarms, Alarm{Learner: i, Line: line, Time: ev.Time})
		}
	}
	if !r.keySet {
		r.Key, r.keySet = ev.Key, true
	}
	if ev.Key == r.Key {
		p := point{line: line, time: ev.Time, target: ev.Target, pred: make([]float64, len(r.names))}
		for i := range r.names {
			if y, ok := eng.Last(i); ok {
				p.pred[i] = y
			} else {
				p.pred[i] = math.NaN()
			}
		}
		r.tail.Push(p)
	}
	if r.applied%r.Every == 0 {
		r.addRow(line, ev.Time, eng)
	}
}

// Finish records a last row for the events after the last full bucket.
func (r *Recorder) Finish(eng *learner.Engine) {
	if r.applied%r.Every != 0 && r.applied > 0 {
		var t int64
		if r.tail.Len() > 0 {
			t = r.tail.At(r.tail.Len() - 1).time
		}
		last := int64(0)
		for _, p := range eng.Positions() {
			last = max(last, p.Offset)
		}
		r.addRow(last, t, eng)
	}
}

func (r *Recorder) addRow(line, t int64, eng *learner.Engine) {
	rep := eng.Report(false)
	row := Row{Line: line, Time: t, Events: rep.Events, MAE: make([]float64, len(r.names)), RMSE: make([]float64, len(r.names))}
	for i, l := range rep.Learners {
		row.MAE[i], row.RMSE[i] = math.NaN(), math.NaN()
		if l.Recent.MAE != nil {
			row.MAE[i], row.RMSE[i] = *l.Recent.MAE, *l.Recent.RMSE
		}
	}
	r.rows = append(r.rows, row)
	if len(r.rows) > MaxRows && r.applied%(2*r.Every) == 0 {
		// Keep the rows at multiples of twice the events per row: the
		// curve as it would have been recorded at that resolution.
		kept := r.rows[:0]
		for k, row := range r.rows {
			if k%2 == 1 {
				kept = append(kept, row)
			}
		}
		r.rows = kept
		r.Every *= 2
	}
}

// Rows returns the curve rows recorded.
func (r *Recorder) Rows() []Row { return r.rows }

// WriteCSV writes the curve: a header line, then one row per bucket with
// the line (position), the event time (RFC 3339, empty without times), the
// events applied, and each learner's recent mae and rmse (empty before it
// has scored).
func (r *Recorder) WriteCSV(w io.Writer) error {
	bw := bufio.NewWriter(w)
	head := []string{"position", "time", "events"}
	for _, n := range r.names {
		head = append(head, csvField(n+" mae"), csvField(n+" rmse"))
	}
	bw.WriteString(strings.Join(head, ",") + "\n")
	for _, row := range r.rows {
		f := []string{strconv.FormatInt(row.Line, 10), "", strconv.FormatInt(row.Events, 10)}
		if row.Time != 0 {
			f[1] = time.Unix(0, row.Time).UTC().Format(time.RFC3339)
		}
		for i := range r.names {
			f = append(f, num(row.MAE[i]), num(row.RMSE[i]))
		}
		bw.WriteString(strings.Join(f, ",") + "\n")
	}
	return bw.Flush()
}

func num(v float64) string {
	if math.IsNaN(v) {
		return ""
	}
	return strconv.FormatFloat(v, 'g', 10, 64)
}

func csvField(s string) string {
	if strings.ContainsAny(s, ",\"\n") {
		return `"` + strings.ReplaceAll(s, `"`, `""`) + `"`
	}
	return s
}

// okabeIto is the Okabe & Ito (2008) palette, "Color Universal Design",
// distinguishable with the common forms of colour blindness.
var okabeIto = []color.Color{
	color.RGBA{0, 114, 178, 255},   // blue
	color.RGBA{230, 159, 0, 255},   // orange
	color.RGBA{0, 158, 115, 255},   // bluish green
	color.RGBA{204, 121, 167, 255}, // reddish purple
	color.RGBA{86, 180, 233, 255},  // sky blue
	color.RGBA{213, 94, 0, 255},    // vermillion
	color.RGBA{240, 228, 66, 255},  // yellow
	color.RGBA{0, 0, 0, 255},       // black
}

// maxPlotted is the most learners drawn in the error panel (the best ones
// by final recent RMSE); a sweep of hundreds would be unreadable.
const maxPlotted = 8

// Plot draws the chart to path; its extension (.svg or .png) picks the
// format. units names the target's units for the axis labels ("" for none).
func (r *Recorder) Plot(path, units string) error {
	format := strings.TrimPrefix(strings.ToLower(filepath.Ext(path)), ".")
	if format != "svg" && format != "png" {
		return fmt.Errorf("chart: %s: want a .svg or .png file", path)
	}
	if len(r.rows) == 0 {
		return fmt.Errorf("chart: nothing to plot: no event was applied")
	}
	order := r.ranked()
	if len(order) > maxPlotted {
		order = order[:maxPlotted]
	}
	unit := ""
	if units != "" {
		unit = " (" + units + ")"
	}
	xOf := func(line, t int64) float64 {
		if r.hasTime {
			return float64(t) / 1e9
		}
		return float64(line)
	}
	top := plot.New()
	top.Title.Text = "Recent prequential error (each key's last scored events), with drift alarms"
	top.Y.Label.Text = "recent RMSE" + unit
	// The legends sit beside the plots, never on the data.
	topLegend, bottomLegend := plot.NewLegend(), plot.NewLegend()
	topLegend.Top, bottomLegend.Top = true, true
	topLegend.Left, bottomLegend.Left = true, true
	for n, i := range order {
		pts := make(plotter.XYs, 0, len(r.rows))
		for _, row := range r.rows {
			if !math.IsNaN(row.RMSE[i]) {
				pts = append(pts, plotter.XY{X: xOf(row.Line, row.Time), Y: row.RMSE[i]})
			}
		}
		if len(pts) == 0 {
			continue
		}
		line, err := plotter.NewLine(pts)
		if err != nil {
			return err
		}
		line.Color = okabeIto[n%len(okabeIto)]
		line.Width = vg.Points(1.5)
		line.Dashes = dashes(n)
		top.Add(line)
		var marks plotter.XYs
		for _, a := range r.alarms {
			if a.Learner == i {
				marks = append(marks, plotter.XY{X: xOf(a.Line, a.Time), Y: nearest(pts, xOf(a.Line, a.Time))})
			}
		}
		// Each learner's alarms have a shape of their own as well as its
		// colour, and the legend shows it beside the line.
		sc, err := plotter.NewScatter(marks)
		if err != nil {
			return err
		}
		sc.GlyphStyle.Shape = alarmShapes[n%len(alarmShapes)]
		sc.GlyphStyle.Color = line.Color
		sc.GlyphStyle.Radius = vg.Points(4)
		if len(marks) > 0 {
			top.Add(sc)
			topLegend.Add(fmt.Sprintf("%s (%d alarms)", r.names[i], len(marks)), line, sc)
		} else {
			topLegend.Add(r.names[i], line)
		}
	}
	best := order[0]
	bottom := plot.New()
	bottom.Title.Text = fmt.Sprintf("Prediction against target, best learner %s, key %q, last %d events", r.names[best], r.Key, r.tail.Len())
	bottom.Y.Label.Text = "target" + unit
	var tgt, prd plotter.XYs
	for j := 0; j < r.tail.Len(); j++ {
		p := r.tail.At(j)
		x := xOf(p.line, p.time)
		tgt = append(tgt, plotter.XY{X: x, Y: p.target})
		if !math.IsNaN(p.pred[best]) {
			prd = append(prd, plotter.XY{X: x, Y: p.pred[best]})
		}
	}
	if len(tgt) > 0 {
		lt, _ := plotter.NewLine(tgt)
		lt.Color, lt.Width = okabeIto[7], vg.Points(1)
		bottom.Add(lt)
		bottomLegend.Add("target", lt)
	}
	if len(prd) > 0 {
		lp, _ := plotter.NewLine(prd)
		lp.Color, lp.Width, lp.Dashes = okabeIto[5], vg.Points(1.5), []vg.Length{vg.Points(4), vg.Points(2)}
		bottom.Add(lp)
		bottomLegend.Add("prediction", lp)
	}
	for _, p := range []*plot.Plot{top, bottom} {
		if r.hasTime {
			p.X.Tick.Marker = wholeTimeTicks{}
			p.X.Label.Text = "event time (UTC)"
		} else {
			p.X.Label.Text = "position (line)"
		}
		p.Add(plotter.NewGrid())
	}
	const w, h, legendW = 34 * vg.Centimeter, 22 * vg.Centimeter, 7 * vg.Centimeter
	c, err := draw.NewFormattedCanvas(w, h, format)
	if err != nil {
		return err
	}
	whole := draw.New(c)
	tiles := draw.Tiles{Rows: 2, Cols: 1, PadTop: vg.Points(6), PadBottom: vg.Points(6), PadLeft: vg.Points(6), PadRight: vg.Points(10), PadY: vg.Points(14)}
	cans := plot.Align([][]*plot.Plot{{top}, {bottom}}, tiles, draw.Crop(whole, 0, -legendW, 0, 0))
	top.Draw(cans[0][0])
	bottom.Draw(cans[1][0])
	legends := draw.Crop(whole, w-legendW, 0, 0, 0)
	topLegend.Draw(draw.Crop(legends, 0, 0, h/2, -vg.Points(24)))
	bottomLegend.Draw(draw.Crop(legends, 0, 0, 0, -h/2-vg.Points(24)))
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if _, err := c.WriteTo(f); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// alarmShapes tell the learners' alarms apart by shape as well as colour.
var alarmShapes = []draw.GlyphDrawer{draw.TriangleGlyph{}, draw.CircleGlyph{}, draw.BoxGlyph{}, draw.PyramidGlyph{},
	draw.RingGlyph{}, draw.SquareGlyph{}, draw.CrossGlyph{}, draw.PlusGlyph{}}

// wholeTimeTicks marks event time (Unix seconds, UTC) on whole hours or
// days: the step is the smallest of 1, 2, 3, 6 or 12 hours, or 1, 2, 7, 14
// or 28 days, that gives at most eight ticks; midnights are labelled with
// the date, other ticks with the hour.
type wholeTimeTicks struct{}

func (wholeTimeTicks) Ticks(min, max float64) []plot.Tick {
	const hour = 3600.0
	steps := []float64{hour, 2 * hour, 3 * hour, 6 * hour, 12 * hour, 24 * hour, 48 * hour, 168 * hour, 336 * hour, 672 * hour}
	step := steps[len(steps)-1]
	for _, s := range steps {
		if (max-min)/s <= 8 {
			step = s
			break
		}
	}
	var ticks []plot.Tick
	for t := math.Ceil(min/step) * step; t <= max; t += step {
		at := time.Unix(int64(t), 0).UTC()
		label := at.Format("15:04")
		if at.Hour() == 0 && at.Minute() == 0 {
			label = at.Format("Jan 2")
		}
		ticks = append(ticks, plot.Tick{Value: t, Label: label})
	}
	return ticks
}

// ranked returns learner indices by their last recent RMSE, best first;
// learners that never scored come last.
func (r *Recorder) ranked() []int {
	last := r.rows[len(r.rows)-1]
	idx := make([]int, len(r.names))
	for i := range idx {
		idx[i] = i
	}
	key := func(i int) float64 {
		if math.IsNaN(last.RMSE[i]) {
			return math.Inf(1)
		}
		return last.RMSE[i]
	}
	for i := 1; i < len(idx); i++ { // insertion sort: stable, few learners
		for j := i; j > 0 && key(idx[j]) < key(idx[j-1]); j-- {
			idx[j], idx[j-1] = idx[j-1], idx[j]
		}
	}
	return idx
}

func dashes(n int) []vg.Length {
	switch n % 3 {
	case 1:
		return []vg.Length{vg.Points(6), vg.Points(3)}
	case 2:
		return []vg.Length{vg.Points(2), vg.Points(2)}
	}
	return nil
}

// nearest returns the y of the point whose x is closest to x.
func nearest(pts plotter.XYs, x float64) float64 {
	best, y := math.Inf(1), 0.0
	for _, p := range pts {
		if d := math.Abs(p.X - x); d < best {
			best, y = d, p.Y
		}
	}
	return y
}
