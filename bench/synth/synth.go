// Package synth generates tidemark's demo scenario: a fictional cold-storage
// warehouse whose compressor power draw must be predicted. The data are
// invented for the demo; nothing here is a measurement.
//
// Three rooms (the event key) report every five minutes of event time:
//
//	outdoor_c = 12 + 8·sin(2π(h − 9)/24) + 3·sin(2π·day/7) + N(0, 0.8²)
//	door_min  ∈ {0..5}: Poisson with mean 2.5 from 06:00 to 20:00, 0.3 otherwise, capped at 5
//	shift     = "day" (06–14), "late" (14–22), "night" (22–06)
//	target kW = base_r + c_r·(outdoor_c − setpoint_r) + 1.5·door_min
//	            + 2·sin(2πh/24) + N(0, 1)
//
// with h the hour of day (UTC, with its fraction) and, per room,
// room-a (freezer): base 30, c 0.40, setpoint −18 °C;
// room-b (chiller): base 18, c 0.50, setpoint 2 °C;
// room-c (chiller): base 15, c 0.45, setpoint 4 °C.
//
// Drift: from the middle of the run, an insulation fault in room-b doubles its
// c_r and adds 4 kW. Bad data: on the day at 70 % of the run, from 10:00 for
// six hours, the shared outdoor sensor is stuck and reports 9.5 °C while the
// power still follows the true temperature. Malformed records: five lines
// spread through the run that are not valid events (cut short, no target, a
// target that is not a number, a non-finite feature, a bare word). Same seed,
// same bytes.
package synth

import (
	"bufio"
	"io"
	"math"
	"math/rand/v2"
	"strconv"
	"time"
)

// Start is the event time of the first reading.
var Start = time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)

// Config configures the scenario. Zero fields take the defaults.
type Config struct {
	Days int    // Default: 14.
	Seed uint64 // Default: 1.
	// Rooms is the number of rooms (keys). Default: 3. Rooms past the first
	// three, named room-4, room-5, …, repeat the three profiles in turn
	// (room-4 is a freezer like room-a); only room-b drifts.
	Rooms int
}

type room struct {
	name              string
	base, c, setpoint float64
}

var rooms = []room{
	{"room-a", 30, 0.40, -18},
	{"room-b", 18, 0.50, 2},
	{"room-c", 15, 0.45, 4},
}

const step = 5 * time.Minute

// Write writes the scenario as NDJSON to w and returns the number of lines.
// Learners is the set the demo compares on this scenario: windowed k-NN,
// forgetting RLS, cumulative RLS, sliding-window RLS and the mean baseline.
// Windows count events per key (a room reports 288 readings a day).
var Learners = []string{
	"knn:k=10,window=2016,name=knn-week",
	"rls:forget=0.995,name=rls-forget",
	"rls:forget=1,name=rls-cumulative",
	"sliding-rls:window=864,name=sliding-rls-3d",
	"mean:window=288,name=mean-day",
}

func Write(w io.Writer, cfg Config) (int, error) {
	if cfg.Days <= 0 {
		cfg.Days = 14
	}
	if cfg.Seed == 0 {
		cfg.Seed = 1
	}
	rng := rand.New(rand.NewPCG(cfg.Seed, 0x7d3a))
	rooms := rooms
	if cfg.Rooms > 0 && cfg.Rooms < len(rooms) {
		rooms = rooms[:cfg.Rooms]
	}
	for i := len(rooms); i < cfg.Rooms; i++ {
		r := rooms[i%3]
		r.name = "room-" + strconv.Itoa(i+1)
		rooms = append(rooms, r)
	}
	bw := bufio.NewWriter(w)
	steps := cfg.Days * 24 * 12
	driftAt := steps / 2
	stuckDay := int(math.Floor(0.7 * float64(cfg.Days)))
	stuckFrom := stuckDay*24*12 + 10*12
	stuckTo := stuckFrom + 6*12
	malformed := map[int]string{}
	for i, s := range []string{
		`{"time":"2026-03-01T00:00:00Z","key":"room-a","features":{"outdoor_c":4.1`,
		`{"time":"%T","key":"room-b","features":{"outdoor_c":7.2,"door_min":1,"shift":"day"}}`,
		`{"time":"%T","key":"room-c","features":{"outdoor_c":7.2,"door_min":1,"shift":"day"},"target":"n/a"}`,
		`{"time":"%T","key":"room-a","features":{"outdoor_c":1e999,"door_min":0,"shift":"night"},"target":31.2}`,
		`sensor-gateway restarted`,
	} {
		malformed[(i+1)*steps/6] = s
	}
	var buf []byte
	lines := 0
	for i := 0; i < steps; i++ {
		t := Start.Add(time.Duration(i) * step)
		h := float64(t.Hour()) + float64(t.Minute())/60
		day := float64(i) / (24 * 12)
		outdoor := 12 + 8*math.Sin(2*math.Pi*(h-9)/24) + 3*math.Sin(2*math.Pi*day/7) + 0.8*rng.NormFloat64()
		reported := outdoor
		if i >= stuckFrom && i < stuckTo {
			reported = 9.5
		}
		shift := "night"
		switch {
		case h >= 6 && h < 14:
			shift = "day"
		case h >= 14 && h < 22:
			shift = "late"
		}
		for _, r := range rooms {
			mean := 0.3
			if h >= 6 && h < 20 {
				mean = 2.5
			}
			door := min(poisson(rng, mean), 5)
			c, base := r.c, r.base
			if r.name == "room-b" && i >= driftAt {
				c, base = 2*c, base+4
			}
			kw := base + c*(outdoor-r.setpoint) + 1.5*float64(door) + 2*math.Sin(2*math.Pi*h/24) + rng.NormFloat64()
			buf = buf[:0]
			buf = append(buf, `{"time":"`...)
			buf = t.AppendFormat(buf, time.RFC3339)
			buf = append(buf, `","key":"`...)
			buf = append(buf, r.name...)
			buf = append(buf, `","features":{"outdoor_c":`...)
			buf = strconv.AppendFloat(buf, math.Round(reported*10)/10, 'f', 1, 64)
			buf = append(buf, `,"door_min":`...)
			buf = strconv.AppendInt(buf, int64(door), 10)
			buf = append(buf, `,"shift":"`...)
			buf = append(buf, shift...)
			buf = append(buf, `"},"target":`...)
			buf = strconv.AppendFloat(buf, math.Round(kw*100)/100, 'f', 2, 64)
			buf = append(buf, "}\n"...)
			if _, err := bw.Write(buf); err != nil {
				return lines, err
			}
			lines++
		}
		if s, ok := malformed[i]; ok {
			s = replaceTime(s, t)
			if _, err := bw.WriteString(s + "\n"); err != nil {
				return lines, err
			}
			lines++
		}
	}
	return lines, bw.Flush()
}

func replaceTime(s string, t time.Time) string {
	for i := 0; i+1 < len(s); i++ {
		if s[i] == '%' && s[i+1] == 'T' {
			return s[:i] + t.Format(time.RFC3339) + s[i+2:]
		}
	}
	return s
}

// poisson draws from a Poisson distribution by Knuth's multiplication method
// (The Art of Computer Programming, vol. 2, §3.4.1), fine for small means.
func poisson(rng *rand.Rand, mean float64) int {
	l, k, p := math.Exp(-mean), 0, 1.0
	for {
		p *= rng.Float64()
		if p <= l {
			return k
		}
		k++
	}
}
