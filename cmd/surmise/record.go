package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
	"surmise/daemon/recording"
)

const recordSynopsis = `--subjects LIST --out FILE [flags]

Writes the messages on the subjects (comma-separated; '*' matches a token,
a final '>' the rest) to FILE as a bus recording for 'surmise replay': one
JSON line per message with the time it was received. Each line is written
whole, so a recorder that is killed loses at most the line being written;
an existing FILE is appended to (a cut last line is removed first).
Runs until interrupted, or for --for.

For a fleet, --stream NAME makes the server record instead: a JetStream
stream capturing the subjects, keeping at most --max-age and --max-bytes
(at least one is required). It records while no recorder runs; with --out
the recording to FILE goes on as well. --export --stream NAME --out FILE
writes what the stream holds to FILE and exits.`

type recordFlags struct {
	bus                   natsFlags
	subjects, out, stream string
	maxAge, length        time.Duration
	maxBytes              int64
	replicas              int
	export                bool
}

func runRecord(ctx context.Context, e *env, args []string) error {
	fs := newFlags(e, "record", recordSynopsis)
	var f recordFlags
	f.bus.register(fs, "NATS server `URL`s, comma-separated (default: this user's newest local daemon, found by its access files, else "+nats.DefaultURL+")")
	fs.StringVar(&f.subjects, "subjects", "", "the `SUBJECTS` to record, comma-separated, such as pilot.hwl.>,surmise.>")
	fs.StringVar(&f.out, "out", "", "the recording `FILE` (appended to)")
	fs.DurationVar(&f.length, "for", 0, "stop after this `DURATION`, such as 20s (default: until interrupted)")
	fs.StringVar(&f.stream, "stream", "", "JetStream stream `NAME` that records the subjects on the server")
	fs.DurationVar(&f.maxAge, "max-age", 0, "the stream keeps messages for at most this `DURATION` (default: no limit)")
	fs.Int64Var(&f.maxBytes, "max-bytes", 0, "the stream keeps at most this many `BYTES` (default: no limit)")
	fs.IntVar(&f.replicas, "replicas", 1, "`N` copies of the stream in a cluster")
	fs.BoolVar(&f.export, "export", false, "write what --stream holds to --out and exit")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usageError("unexpected arguments %q (subjects go in --subjects)", pos)
	}
	var subjects []string
	for _, s := range strings.Split(f.subjects, ",") {
		if s = strings.TrimSpace(s); s != "" {
			subjects = append(subjects, s)
		}
	}
	switch {
	case f.export && (f.stream == "" || f.out == ""):
		return usageError("--export needs --stream and --out")
	case f.export && len(subjects) > 0:
		return usageError("--export writes the stream's subjects; --subjects is for recording")
	case !f.export && len(subjects) == 0:
		return usageError("--subjects is required")
	case !f.export && f.out == "" && f.stream == "":
		return usageError("--out FILE or --stream NAME is required")
	case f.stream == "" && (f.maxAge != 0 || f.maxBytes != 0):
		return usageError("--max-age and --max-bytes limit a --stream")
	case f.stream != "" && !f.export && f.maxAge <= 0 && f.maxBytes <= 0:
		return usageError("--stream needs --max-age or --max-bytes: a recording stream must not grow for ever")
	case f.length < 0:
		return usageError("--for %v: want a positive duration", f.length)
	}
	if !f.export {
		if err := daemon.CheckSubjects(subjects); err != nil {
			return usageError("--subjects: %v", err)
		}
	}
	nc, err := f.bus.dial(5*time.Second, nil, nats.Name("surmise-record"), nats.MaxReconnects(-1))
	if err != nil {
		return err
	}
	defer nc.Close()

	if f.export {
		file, _, err := openRecording(f.out)
		if err != nil {
			return err
		}
		n, err := daemon.ExportStream(ctx, nc, f.stream, recording.NewWriter(file))
		if cerr := file.Close(); err == nil {
			err = cerr
		}
		if err != nil {
			return err
		}
		fmt.Fprintf(e.stdout, "wrote %d messages of stream %s to %s\n", n, f.stream, f.out)
		return nil
	}
	if f.stream != "" {
		cfg, err := daemon.EnsureRecordStream(ctx, nc, daemon.RecordStreamOptions{
			Name: f.stream, Subjects: subjects, MaxAge: f.maxAge, MaxBytes: f.maxBytes, Replicas: f.replicas,
		})
		if err != nil {
			return err
		}
		limits := []string{}
		if cfg.MaxAge > 0 {
			limits = append(limits, "at most "+cfg.MaxAge.String())
		}
		if cfg.MaxBytes > 0 {
			limits = append(limits, fmt.Sprintf("at most %d bytes", cfg.MaxBytes))
		}
		fmt.Fprintf(e.stdout, "stream %s records %s on %s, keeping %s (export: surmise record --export --stream %s --out FILE)\n",
			cfg.Name, strings.Join(cfg.Subjects, ","), nc.ConnectedUrlRedacted(), strings.Join(limits, " and "), cfg.Name)
		if f.out == "" {
			return nil
		}
	}

	file, cut, err := openRecording(f.out)
	if err != nil {
		return err
	}
	defer file.Close()
	if cut > 0 {
		fmt.Fprintf(e.stderr, "%s: removed a cut last line (%d bytes) left by a recorder that was stopped mid-write\n", f.out, cut)
	}
	rec, err := daemon.StartRecorder(nc, recording.NewWriter(file), subjects)
	if err != nil {
		return err
	}
	until := "until interrupted (Ctrl-C)"
	if f.length > 0 {
		until = fmt.Sprintf("for %v (Ctrl-C stops it sooner)", f.length)
	}
	fmt.Fprintf(e.stdout, "recording %s from %s to %s %s\n", strings.Join(subjects, ","), nc.ConnectedUrlRedacted(), f.out, until)
	var timeout <-chan time.Time
	if f.length > 0 {
		t := time.NewTimer(f.length)
		defer t.Stop()
		timeout = t.C
	}
	select {
	case <-ctx.Done():
	case <-timeout:
	case <-rec.Failed():
	}
	err = rec.Stop()
	if cerr := file.Close(); err == nil {
		err = cerr
	}
	fmt.Fprintf(e.stdout, "wrote %d messages to %s\n", rec.Count(), f.out)
	return err
}

// openRecording opens path for appending, creating it if needed. A last
// line without its newline — the mark of a recorder killed mid-write — is
// cut off first, so that the lines appended follow whole lines; it returns
// how many bytes were cut.
func openRecording(path string) (*os.File, int64, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		return nil, 0, err
	}
	size, err := f.Seek(0, io.SeekEnd)
	if err != nil {
		f.Close()
		return nil, 0, err
	}
	keep := size
	if size > 0 {
		// Look back for the last newline, a block at a time.
		const block = 64 << 10
		buf := make([]byte, block)
		for end := size; ; {
			start := max(end-block, 0)
			n, err := f.ReadAt(buf[:end-start], start)
			if err != nil && !errors.Is(err, io.EOF) {
				f.Close()
				return nil, 0, err
			}
			if end == size && n > 0 && buf[n-1] == '\n' {
				break // ends in a whole line
			}
			if i := bytes.LastIndexByte(buf[:n], '\n'); i >= 0 {
				keep = start + int64(i) + 1
				break
			}
			if start == 0 {
				keep = 0
				break
			}
			end = start
		}
	}
	if keep < size {
		if err := f.Truncate(keep); err != nil {
			f.Close()
			return nil, 0, err
		}
	}
	if _, err := f.Seek(keep, io.SeekStart); err != nil {
		f.Close()
		return nil, 0, err
	}
	return f, size - keep, nil
}
