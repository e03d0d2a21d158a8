package main

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"tidemark/checkpoint"
)

const checkpointsUsage = `checkpoints list DIR [--json]
       tidemark checkpoints show DIR VERSION [--json]
       tidemark checkpoints verify DIR [VERSION]
       tidemark checkpoints pin|unpin DIR VERSION`

func runCheckpoints(args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("checkpoints", checkpointsUsage, stderr)
	asJSON := fs.Bool("json", false, "print JSON (list, show)")
	pos, err := parse(fs, args)
	if err != nil {
		return err
	}
	if len(pos) < 2 {
		return usagef("want a subcommand and a directory; usage: tidemark %s", checkpointsUsage)
	}
	sub, dir, rest := pos[0], pos[1], pos[2:]
	version := func() (uint64, error) {
		if len(rest) != 1 {
			return 0, usagef("%s wants exactly one VERSION", sub)
		}
		v, err := strconv.ParseUint(rest[0], 10, 64)
		if err != nil || v == 0 {
			return 0, usagef("version %q: want a positive integer", rest[0])
		}
		return v, nil
	}
	// Inspecting commands open the store read-only: they create, remove and
	// lock nothing, so they are safe beside a running service. Pin and unpin
	// change it, as a writer that shares the store.
	readOnly := sub == "list" || sub == "show" || sub == "verify"
	if st, err := os.Stat(dir); err != nil || !st.IsDir() {
		return fmt.Errorf("%w in %s: the directory does not exist (a service keeps its checkpoints in DATA/checkpoints)", checkpoint.ErrNoStore, dir)
	}
	if holdsNoCheckpoint(dir) {
		// A service's data directory: its checkpoints are in checkpoints/.
		if st, err := os.Stat(filepath.Join(dir, "checkpoints")); err == nil && st.IsDir() {
			dir = filepath.Join(dir, "checkpoints")
		}
	}
	if parts, _ := filepath.Glob(filepath.Join(dir, "partition-*")); len(parts) > 0 {
		// A consumer group's checkpoint directory: a store per partition.
		if sub != "list" {
			return usagef("%s holds a consumer group's checkpoints, a store per partition: give the partition's directory, e.g. %s", dir, parts[0])
		}
		return listPartitions(stdout, parts, *asJSON)
	}
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: dir, ReadOnly: readOnly})
	if err != nil {
		return err
	}
	defer store.Close()
	switch sub {
	case "list":
		if len(rest) > 0 {
			return usagef("list takes no VERSION")
		}
		list, err := store.List()
		if err != nil {
			return err
		}
		if *asJSON {
			if list == nil {
				list = []checkpoint.Info{} // an empty store lists as []
			}
			return writeJSON(stdout, list)
		}
		if len(list) == 0 {
			fmt.Fprintf(stdout, "no checkpoints in %s yet\n", dir)
			return nil
		}
		return writeCheckpointTable(stdout, list)
	case "show":
		v, err := version()
		if err != nil {
			return err
		}
		c, err := store.Load(v)
		if err != nil {
			return err
		}
		if *asJSON {
			return writeJSON(stdout, struct {
				checkpoint.Info
				Manifest checkpoint.Manifest `json:"manifest"`
			}{c.Info, c.Manifest})
		}
		return writeCheckpointShow(stdout, c)
	case "verify":
		var list []checkpoint.Info
		if len(rest) > 0 {
			v, err := version()
			if err != nil {
				return err
			}
			c, err := store.Load(v)
			if errors.Is(err, checkpoint.ErrNotFound) {
				return err
			}
			info := checkpoint.Info{Version: v, File: checkpoint.FileName(v)}
			if err != nil {
				info.Error = err.Error()
			} else {
				info = c.Info
			}
			list = []checkpoint.Info{info}
		} else if list, err = store.Verify(); err != nil {
			return err
		}
		if len(list) == 0 {
			return fmt.Errorf("no checkpoints in %s", dir)
		}
		var bad []string
		for _, in := range list {
			if in.Error != "" {
				fmt.Fprintf(stdout, "version %d: FAILED: %s\n", in.Version, in.Error)
				bad = append(bad, strconv.FormatUint(in.Version, 10))
			} else {
				fmt.Fprintf(stdout, "version %d: ok (state_sha256 %s, %d events)\n", in.Version, in.StateSHA256, in.Events)
			}
		}
		if len(bad) > 0 {
			return fmt.Errorf("%d of %d checkpoints fail verification: version %s", len(bad), len(list), strings.Join(bad, ", "))
		}
		return nil
	case "pin", "unpin":
		v, err := version()
		if err != nil {
			return err
		}
		if sub == "pin" {
			return store.Pin(v)
		}
		return store.Unpin(v)
	}
	return usagef("unknown subcommand %q (want list, show, verify, pin or unpin)", sub)
}

func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

func positions(ps []checkpoint.Position) string {
	var s []string
	for _, p := range ps {
		s = append(s, fmt.Sprintf("%d:%d", p.Partition, p.Offset))
	}
	return strings.Join(s, " ")
}

// timesText shows the range of event times a checkpoint covers.
func timesText(r *checkpoint.TimeRange) string {
	if r == nil {
		return "–"
	}
	return r.First.Format(time.RFC3339) + " … " + r.Last.Format(time.RFC3339)
}

// holdsNoCheckpoint reports whether dir has no checkpoint file of its own.
func holdsNoCheckpoint(dir string) bool {
	files, _ := filepath.Glob(filepath.Join(dir, "ckpt-*"))
	return len(files) == 0
}

// sourceText shows a checkpoint's record of its source with the times of a
// skip rule as RFC 3339 times instead of nanoseconds.
func sourceText(raw []byte) string {
	var src map[string]any
	d := json.NewDecoder(bytes.NewReader(raw))
	d.UseNumber()
	if d.Decode(&src) != nil {
		return string(raw)
	}
	if skip, ok := src["skip"].(map[string]any); ok {
		for _, k := range []string{"from_time", "to_time"} {
			if n, ok := skip[k].(json.Number); ok {
				if ns, err := n.Int64(); err == nil {
					skip[k] = time.Unix(0, ns).UTC().Format(time.RFC3339Nano)
				}
			}
		}
		delete(skip, "has_time")
	}
	b, err := json.Marshal(src)
	if err != nil {
		return string(raw)
	}
	return string(b)
}

// listPartitions lists the checkpoints of every partition store of a
// consumer group's checkpoint directory, partition by partition.
func listPartitions(w io.Writer, dirs []string, asJSON bool) error {
	list := []checkpoint.Info{}
	for _, d := range dirs {
		n, err := strconv.ParseInt(strings.TrimPrefix(filepath.Base(d), "partition-"), 10, 32)
		if err != nil {
			continue // not a partition store
		}
		p := int32(n)
		store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: d, ReadOnly: true})
		if err != nil {
			return err
		}
		l, err := store.List()
		store.Close()
		if err != nil {
			return err
		}
		for i := range l {
			l[i].Partition = &p
		}
		list = append(list, l...)
	}
	if asJSON {
		return writeJSON(w, list)
	}
	return writeCheckpointTable(w, list)
}

func writeCheckpointTable(w io.Writer, list []checkpoint.Info) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "version\tcreated\treason\tevents\tevent times\tposition\tbytes\traw bytes\tpinned\tstate_sha256")
	for _, in := range list {
		if in.Error != "" {
			fmt.Fprintf(tw, "%d\tCORRUPT: %s\n", in.Version, in.Error)
			continue
		}
		pin := ""
		if in.Pinned {
			pin = "pinned"
		}
		fmt.Fprintf(tw, "%d\t%s\t%s\t%d\t%s\t%s\t%d\t%d\t%s\t%s\n", in.Version, in.Created.Format(time.RFC3339), in.Reason,
			in.Events, timesText(in.EventTimes), positions(in.Position), in.Bytes, in.RawBytes, pin, in.StateSHA256[:16])
	}
	return tw.Flush()
}

func writeCheckpointShow(w io.Writer, c *checkpoint.Checkpoint) error {
	m := c.Manifest
	fmt.Fprintf(w, "version       %d (parent %d)\nfile          %s\ncreated       %s\nreason        %s\n", m.Version, m.Parent, c.Info.File, m.Created.Format(time.RFC3339), m.Reason)
	fmt.Fprintf(w, "events        %d\nevent times   %s\nposition      %s\nstate_sha256  %s\nconfig_sha256 %s\n", m.Events, timesText(m.EventTimes), positions(m.Positions), m.StateSHA256, m.ConfigSHA256)
	fmt.Fprintf(w, "bytes         %d (raw %d, ratio %.2f)\npinned        %t\n", c.Info.Bytes, m.RawBytes, float64(m.RawBytes)/float64(max(c.Info.Bytes, 1)), c.Info.Pinned)
	if len(m.Source) > 0 {
		fmt.Fprintf(w, "source        %s\n", sourceText(m.Source))
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "\nlearner\tscored\tmae\trmse")
	for _, l := range m.Metrics {
		fmt.Fprintf(tw, "%s\t%d\t%s\t%s\n", l.Name, l.Scored, fnum(l.MAE), fnum(l.RMSE))
	}
	return tw.Flush()
}

func fnum(p *float64) string {
	if p == nil {
		return "–"
	}
	return strconv.FormatFloat(*p, 'g', 6, 64)
}
