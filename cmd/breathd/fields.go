package main

import (
	"encoding/json"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"

	"breathd/stream/payload"
)

// cmdFields prints the data dictionary: as a table, as JSON (--json), the
// breath CSV's Table Schema (--schema) or its column names (--csv-columns,
// for tools that need the header typed in).
func cmdFields(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("fields", "fields [--json | --schema | --csv-columns]", stderr)
	asJSON := fs.Bool("json", false, "the whole dictionary as JSON (what the meta topic carries)")
	schema := fs.Bool("schema", false, "the breath CSV's Frictionless Table Schema (what analyze writes beside a CSV)")
	columns := fs.Bool("csv-columns", false, "the breath CSV's column names, comma-separated")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return usagef("fields takes no arguments; got %q", fs.Args())
	}
	d := payload.Dictionary(versionString())
	switch {
	case *asJSON:
		out, _ := json.MarshalIndent(d, "", "  ")
		_, err := fmt.Fprintf(stdout, "%s\n", out)
		return err
	case *schema:
		_, err := stdout.Write(payload.TableSchema())
		return err
	case *columns:
		names := make([]string, 0, len(d.CSV))
		for _, c := range d.CSV {
			names = append(names, c.Name)
		}
		_, err := fmt.Fprintln(stdout, strings.Join(names, ","))
		return err
	}
	tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
	for _, part := range []struct {
		title   string
		entries []payload.Entry
	}{{"breath (MQTT <root>/<device>/breath; the CSV adds device and run at the end)", d.Breath}, {"flags", d.Flags},
		{"asynchrony", d.Asynchrony}, {"trend", d.Trend}, {"trend.fields.<field>", d.TrendStat},
		{"trend.asynchrony, trend.asynchrony_period", d.AsynchronyTally}, {"event", d.Event}, {"active.active[]", d.Active},
		{"status", d.Status}, {"status.counters", d.Counters}} {
		fmt.Fprintf(tw, "\n%s\n", part.title)
		for _, e := range part.entries {
			unit := e.Unit
			if unit == "" {
				unit = "-"
			}
			fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", e.Name, unit, e.Type, e.Meaning)
		}
	}
	fmt.Fprintf(tw, "\nquantiles: %s\nunits are UCUM; payload version %d, breathd %s\n", d.Quantiles, d.V, d.Version)
	return tw.Flush()
}
