// Command breathd reads a ventilator's airway pressure and flow stream and
// reports respiratory mechanics. Run "breathd help" for the verbs.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"runtime/debug"
	"strings"
	"syscall"
	"time"

	"breathd/stream"

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"
)

// version is set at build time with -ldflags "-X main.version=…".
var version = ""

const usage = `breathd — per-breath respiratory mechanics from a ventilator's pressure/flow stream.

NOTICE: %s

Usage:
  breathd run --config FILE        run the devices of a configuration file
  breathd replay [flags] FILE      run on a recorded stream (FILE or - for stdin)
  breathd analyze [flags] FILE     per-breath mechanics of a recording, as fast as possible (--csv PATH|-)
  breathd simulate [flags]         write a simulated patient's stream to a file, stdout or a pseudo-terminal
  breathd watch [flags]            show live values, events and status from the broker
  breathd check FILE               validate a configuration file and show what it would run
  breathd ports                    list serial ports with their USB details
  breathd fields [flags]           the data dictionary: every field with its unit and meaning
  breathd version                  print the version
  breathd help                     this text

Run "breathd VERB -h" for a verb's flags.
`

// usageError is a mistake in the command line: exit code 2. It keeps the
// cause when the message wraps one (%w).
type usageError struct{ err error }

func (e *usageError) Error() string { return e.err.Error() }

// Unwrap returns the cause.
func (e *usageError) Unwrap() error { return errors.Unwrap(e.err) }

func usagef(format string, a ...any) error { return &usageError{fmt.Errorf(format, a...)} }

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

// run executes one command line and returns the exit code.
func run(args []string, stdout, stderr io.Writer) int {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	err := dispatch(ctx, args, stdout, stderr)
	if err == nil || errors.Is(err, flag.ErrHelp) {
		return 0
	}
	fmt.Fprintf(stderr, "breathd: %v\n", err)
	var ue *usageError
	if errors.As(err, &ue) {
		return 2
	}
	return 1
}

func dispatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprintf(stderr, usage, stream.Advisory)
		return usagef("no verb given")
	}
	verb, rest := args[0], args[1:]
	switch verb {
	case "run":
		return cmdRun(ctx, rest, stdout, stderr)
	case "replay":
		return cmdReplay(ctx, rest, stdout, stderr)
	case "analyze":
		return cmdAnalyze(ctx, rest, stdout, stderr)
	case "simulate":
		return cmdSimulate(ctx, rest, stdout, stderr)
	case "watch":
		return cmdWatch(ctx, rest, stdout, stderr)
	case "check":
		return cmdCheck(rest, stdout, stderr)
	case "ports":
		return cmdPorts(rest, stdout, stderr)
	case "fields":
		return cmdFields(rest, stdout, stderr)
	case "version", "--version":
		fmt.Fprintln(stdout, "breathd", versionString())
		return nil
	case "help", "-h", "-help", "--help":
		fmt.Fprintf(stdout, usage, stream.Advisory)
		return nil
	}
	return usagef("unknown verb %q (try: breathd help)", verb)
}

func versionString() string {
	if version != "" {
		return version
	}
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "unknown"
	}
	if bi.Main.Version != "" && bi.Main.Version != "(devel)" {
		return bi.Main.Version // go install breathd@version
	}
	// a build from a checkout: the commit it was built from
	rev, dirty := "", false
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.modified":
			dirty = s.Value == "true"
		}
	}
	if rev == "" {
		return "devel"
	}
	v := "devel+" + rev[:min(12, len(rev))]
	if dirty {
		v += "-modified"
	}
	return v
}

// newFlags makes a verb's flag set whose errors become usage errors.
func newFlags(name, synopsis string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "Usage: breathd %s\n\nNOTICE: %s\n", synopsis, stream.Advisory)
		printFlags(stderr, fs)
	}
	return fs
}

// printFlags lists a verb's flags as the README writes them, --name, and
// nothing when the verb has none.
func printFlags(w io.Writer, fs *flag.FlagSet) {
	first := true
	fs.VisitAll(func(f *flag.Flag) {
		if first {
			fmt.Fprint(w, "\nFlags:\n")
			first = false
		}
		name, usage := flag.UnquoteUsage(f)
		line := "  --" + f.Name
		if name != "" {
			line += " " + name
		}
		fmt.Fprintf(w, "%s\n    \t%s", line, strings.ReplaceAll(usage, "\n", "\n    \t"))
		if f.DefValue != "" && f.DefValue != "false" && f.DefValue != "0" && f.DefValue != "0s" && !strings.Contains(usage, "(default") {
			fmt.Fprintf(w, " (default %s)", f.DefValue)
		}
		fmt.Fprintln(w)
	})
}

// parseFlags parses args; a bad flag is a usage error in one line.
func parseFlags(fs *flag.FlagSet, args []string) error {
	out, show := fs.Output(), fs.Usage
	fs.SetOutput(io.Discard)
	fs.Usage = func() {}
	err := fs.Parse(args)
	fs.SetOutput(out)
	fs.Usage = show
	if errors.Is(err, flag.ErrHelp) {
		show()
		return err
	}
	if err != nil {
		return usagef("%s: %w (see breathd %s -h)", fs.Name(), err, fs.Name())
	}
	// a flag after the first argument is taken as an argument: say so
	for _, a := range fs.Args()[min(1, fs.NArg()):] {
		if len(a) > 1 && a[0] == '-' {
			return usagef("flags go before the recording or other arguments: breathd %s %s … %s", fs.Name(), a, fs.Arg(0))
		}
	}
	return nil
}

// newLogger logs JSON to stderr, or readable lines when stderr is a
// terminal.
func newLogger(stderr io.Writer, level zerolog.Level) zerolog.Logger {
	zerolog.TimeFieldFormat = time.RFC3339Nano
	var w io.Writer = stderr
	f, _ := stderr.(*os.File)
	switch {
	case f != nil && toJournal(os.Getenv("JOURNAL_STREAM"), f):
		w = newJournalWriter(stderr) // under systemd: the journal's priorities
	case f != nil && isatty.IsTerminal(f.Fd()):
		w = zerolog.ConsoleWriter{Out: stderr, TimeFormat: "15:04:05"}
	}
	return zerolog.New(w).Level(level).With().Timestamp().Logger()
}
