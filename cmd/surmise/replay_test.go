package main

import (
	"encoding/csv"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

func recordingPath(name string) string {
	return filepath.Join("..", "..", "testdata", "recordings", name)
}

// TestReplayFixtures replays the committed recordings of the demo plant
// with its gains file's two sets and checks the summary, the issues with
// their lines, the estimates CSV and the HTML report with its plots.
func TestReplayFixtures(t *testing.T) {
	for _, tc := range []struct {
		data   string
		ticks  string   // how many, to when
		issues []string // on stderr
	}{
		// The ticks fall half a period after the samples' arrival: the
		// jittered ones (up to 400 ms late) are all in time.
		{"hotwater-loop-rehearsal.jsonl", "240 ticks every 1s, 2026-01-05T08:00:00.516121552Z to 2026-01-05T08:03:59.516121552Z", nil},
		{"hotwater-loop-rehearsal.csv", "240 ticks every 1s, 2026-01-05T08:00:00Z to 2026-01-05T08:03:59Z", nil},
	} {
		t.Run(tc.data, func(t *testing.T) {
			dir := t.TempDir()
			html, out := filepath.Join(dir, "r.html"), filepath.Join(dir, "r.csv")
			stdout, stderr, code := cli(t, "replay", plantPath("hotwater-loop.yaml"), "--data", recordingPath(tc.data), "--report", html, "--out-csv", out)
			if code != 0 {
				t.Fatalf("exit %d\n%s%s", code, stdout, stderr)
			}
			// 240 samples a second apart: ticks from the first to the last.
			const n = 240
			for _, want := range []string{
				"replayed hotwater-loop on " + recordingPath(tc.data) + ": " + tc.ticks + ", 2 gain sets",
				"heater_power: 240 offered",
				"poles-prediction (prediction)", "kalman-current (current)",
				"error       element_temp", "wrote " + out + " (" + strconv.Itoa(2*n) + " rows)", "wrote " + html,
			} {
				if !strings.Contains(stdout, want) {
					t.Errorf("stdout lacks %q:\n%s", want, stdout)
				}
			}
			for _, want := range tc.issues {
				if !strings.Contains(stderr, want) {
					t.Errorf("stderr lacks %q:\n%s", want, stderr)
				}
			}
			if tc.issues == nil && stderr != "" {
				t.Errorf("stderr: %s", stderr)
			}
			page, err := os.ReadFile(html)
			if err != nil {
				t.Fatal(err)
			}
			// Plots: innovations of 2 outputs, the NIS, 4 states.
			if n := strings.Count(string(page), "<svg"); n < 7 {
				t.Errorf("%d SVG plots in the report, want at least 7", n)
			}
			for _, want := range []string{"poles-prediction", "kalman-current", "element_temp", "hx_outlet"} {
				if !strings.Contains(string(page), want) {
					t.Errorf("the report does not mention %s", want)
				}
			}
			f, err := os.Open(out)
			if err != nil {
				t.Fatal(err)
			}
			defer f.Close()
			rows, err := csv.NewReader(f).ReadAll()
			if err != nil {
				t.Fatal(err)
			}
			if len(rows) != 2*n+1 || rows[0][0] != "time" || rows[0][len(rows[0])-1] != "truth.heat_loss" {
				t.Fatalf("%d rows, header %q", len(rows), rows[0])
			}
			if rows[1][1] != "poles-prediction" || rows[2][1] != "kalman-current" || rows[1][0] != rows[2][0] {
				t.Errorf("the first tick's rows: %q, %q", rows[1][:4], rows[2][:4])
			}
			if st, err := os.Stat(out); err != nil || st.Mode().Perm() != 0o644 {
				t.Errorf("estimates file mode %v, %v; want 0644", st.Mode(), err)
			}
		})
	}
}

func TestReplayGainsFlags(t *testing.T) {
	plant := plantPath("hotwater-loop.yaml")
	data := recordingPath("hotwater-loop-rehearsal.csv")
	gains := plantPath("hotwater-loop.gains.yaml")
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"--gains", gains}, 0, "1 gain set\n"},
		{[]string{"--gains", gains + ":kalman-current"}, 0, "kalman-current (current)"},
		{[]string{"--gains", gains, "--gains", gains}, 0, "poles-prediction (" + gains + ") (prediction)"},
		{[]string{"--gains", gains + ":nonesuch"}, 1, `has no gain set "nonesuch"`},
		{[]string{"--gains", "no-such.gains.yaml"}, 1, "does not exist"},
		{[]string{"--tz", "Mars/Olympus"}, 2, `--tz "Mars/Olympus"`},
		{[]string{"--start", "yesterday"}, 2, `--start "yesterday"`},
		{[]string{"--end", "2026-01-05T08:01:00Z"}, 0, "61 ticks every 1s"},
	} {
		args := append([]string{"replay", plant, "--data", data}, tc.args...)
		stdout, stderr, code := cli(t, args...)
		if code != tc.code || !strings.Contains(stdout+stderr, tc.want) {
			t.Errorf("%q: exit %d\n%s%s\nwant exit %d and %q", tc.args, code, stdout, stderr, tc.code, tc.want)
		}
	}
	if _, stderr, code := cli(t, "replay", plant); code != 2 || !strings.Contains(stderr, "--data FILE is required") {
		t.Errorf("without --data: exit %d, %s", code, stderr)
	}
}

// TestReplayTimeZone replays a CSV written in local time without a zone:
// refused without --tz (naming the line), read with it.
func TestReplayTimeZone(t *testing.T) {
	path := filepath.Join(t.TempDir(), "local.csv")
	rows := "time,heater_power,tank_outlet,hx_outlet\n"
	for k := range 10 {
		rows += "2026-03-29 01:59:5" + string(rune('0'+k)) + ",6,61,54.4\n"
	}
	if err := os.WriteFile(path, []byte(rows), 0o644); err != nil {
		t.Fatal(err)
	}
	_, stderr, code := cli(t, "replay", plantPath("hotwater-loop.yaml"), "--data", path)
	if code != 1 || !strings.Contains(stderr, path+":2") {
		t.Errorf("without --tz: exit %d, %s", code, stderr)
	}
	stdout, stderr, code := cli(t, "replay", plantPath("hotwater-loop.yaml"), "--data", path, "--tz", "Europe/Berlin")
	// 01:59:50 CET is 00:59:50 UTC.
	if code != 0 || !strings.Contains(stdout, "10 ticks every 1s, 2026-03-29T00:59:50Z to 2026-03-29T00:59:59Z") {
		t.Errorf("with --tz: exit %d\n%s%s", code, stdout, stderr)
	}
}

// TestReplayIssuesPrinted replays the bus recording with its ticks on the
// sample times (--start): the samples the scenario delayed arrive after
// their tick and are refused as late, which stderr reports with the line
// of the first of each signal.
func TestReplayIssuesPrinted(t *testing.T) {
	data := recordingPath("hotwater-loop-rehearsal.jsonl")
	stdout, stderr, code := cli(t, "replay", plantPath("hotwater-loop.yaml"), "--data", data, "--start", "2026-01-05T08:00:00Z")
	if code != 0 {
		t.Fatalf("exit %d\n%s%s", code, stdout, stderr)
	}
	// Lines 714 and 716: the first delayed samples of each output, 105 s
	// into the first cycle (7 messages a sample, fewer while a sensor
	// drops out or is slow).
	want := data + `:714: signal "tank_outlet": 30 samples refused by the engine (late): dated at or before a tick that had already run when it was received` + "\n" +
		data + `:716: signal "hx_outlet": 30 samples refused by the engine (late): dated at or before a tick that had already run when it was received` + "\n"
	if stderr != want {
		t.Errorf("stderr:\n%s\nwant:\n%s", stderr, want)
	}
	for _, w := range []string{"first tick: given by --start", "tank_outlet: 220 offered, 30 refused (late 30), 190 used", "issues: 2 (on standard error, with their lines)"} {
		if !strings.Contains(stdout, w) {
			t.Errorf("stdout lacks %q:\n%s", w, stdout)
		}
	}
}
