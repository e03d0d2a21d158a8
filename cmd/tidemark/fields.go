package main

import (
	"flag"
	"fmt"
	"strings"
	"time"

	"tidemark/api/intake"
)

// fieldFlags are the flags of a field mapping (intake.Fields), shared by
// replay and serve.
type fieldFlags struct {
	time, key, target, timeFormat, timeZone *string
	ignore, featuresFrom, rename            multi
}

func (f *fieldFlags) register(fs *flag.FlagSet) {
	f.time = fs.String("time-field", "time", "the column (CSV, Parquet) or field (JSON: a dotted path) of the event time")
	f.key = fs.String("key-field", "key", "the column or field of the key")
	f.target = fs.String("target-field", "target", "the column or field of the target")
	f.timeFormat = fs.String("time-format", intake.TimeRFC3339, "how times are written: rfc3339, unix_s, unix_ms, unix_us, or a layout such as '2006-01-02 15:04:05'")
	f.timeZone = fs.String("time-zone", "UTC", "the zone of times written without one (an IANA name such as Europe/Oslo)")
	fs.Var(&f.ignore, "ignore", "a column (CSV, Parquet) or field (JSON) that is not a feature (repeatable)")
	fs.Var(&f.featuresFrom, "features-from", "JSON: an object (a dotted path) whose members are features (repeatable; default: \"features\")")
	fs.Var(&f.rename, "rename", "`SOURCE=FEATURE` renames a column or field (repeatable)")
}

// fieldsFile is the configuration file's fields: section.
type fieldsFile struct {
	Time         string            `yaml:"time"`
	Key          string            `yaml:"key"`
	Target       string            `yaml:"target"`
	TimeFormat   string            `yaml:"time_format"`
	TimeZone     string            `yaml:"time_zone"`
	Ignore       []string          `yaml:"ignore"`
	FeaturesFrom []string          `yaml:"features_from"`
	Rename       map[string]string `yaml:"rename"`
}

// fields builds the mapping from the flags set (set), then the file's
// section, then the defaults; categorical and numeric come from the
// engine's flags. Every problem is listed.
func (f *fieldFlags) fields(set map[string]bool, file fieldsFile, categorical, numeric []string) (intake.Fields, error) {
	pick := func(name, flagVal, fileVal string) string {
		if set[name] || fileVal == "" {
			return flagVal
		}
		return fileVal
	}
	var problems []string
	zoneName := pick("time-zone", *f.timeZone, file.TimeZone)
	zone, err := time.LoadLocation(zoneName)
	if err != nil {
		problems = append(problems, fmt.Sprintf("time zone %q: %v", zoneName, err))
	}
	out := intake.Fields{Time: pick("time-field", *f.time, file.Time), Key: pick("key-field", *f.key, file.Key),
		Target: pick("target-field", *f.target, file.Target), TimeFormat: pick("time-format", *f.timeFormat, file.TimeFormat), Zone: zone,
		Ignore: append([]string(f.ignore), file.Ignore...), FeaturesFrom: append([]string(f.featuresFrom), file.FeaturesFrom...),
		Categorical: categorical, Numeric: numeric}
	for src, dst := range file.Rename {
		if out.Rename == nil {
			out.Rename = map[string]string{}
		}
		out.Rename[src] = dst
	}
	for _, r := range f.rename {
		src, dst, ok := strings.Cut(r, "=")
		if !ok {
			problems = append(problems, fmt.Sprintf("--rename %q: want SOURCE=FEATURE", r))
			continue
		}
		if out.Rename == nil {
			out.Rename = map[string]string{}
		}
		out.Rename[src] = dst
	}
	if err := out.Validate(); err != nil {
		problems = append(problems, strings.Split(err.Error(), "\n")...)
	}
	if len(problems) > 0 {
		return out, fmt.Errorf("field mapping: %s", strings.Join(problems, "; "))
	}
	return out, nil
}
