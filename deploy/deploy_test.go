package deploy

import (
	"bufio"
	"bytes"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"gopkg.in/yaml.v3"
)

// requireTool returns the path of an outside program. When it is absent the test is skipped,
// naming the program, or fails when CI=true: .ci/run installs every program these tests use.
func requireTool(t *testing.T, name, install string) string {
	t.Helper()
	path, err := exec.LookPath(name)
	if err == nil {
		return path
	}
	if os.Getenv("CI") == "true" {
		t.Fatalf("%s is not on PATH but CI=true: .ci/run must install it (%s): %v", name, install, err)
	}
	t.Skipf("%s is not on PATH; install it to run this test (%s)", name, install)
	return ""
}

// runTool runs an outside program with a deadline and returns its combined output.
func runTool(t *testing.T, env []string, name string, args ...string) (string, error) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, name, args...)
	if env != nil {
		cmd.Env = append(os.Environ(), env...)
	}
	out, err := cmd.CombinedOutput()
	return string(out), err
}

// readFile reads a file of the kit or fails the test.
func readFile(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("reading %s: %v", path, err)
	}
	return b
}

// copyFiles copies files into dir, keeping their base names, and returns the new paths in order.
func copyFiles(t *testing.T, dir string, paths ...string) []string {
	t.Helper()
	var out []string
	for _, p := range paths {
		dst := filepath.Join(dir, filepath.Base(p))
		if err := os.WriteFile(dst, readFile(t, p), 0o644); err != nil {
			t.Fatalf("copying %s: %v", p, err)
		}
		out = append(out, dst)
	}
	return out
}

const promtoolInstall = "Debian: apt-get install prometheus"

// --- Prometheus ------------------------------------------------------------------------------

func TestPromtoolCheckRules(t *testing.T) {
	promtool := requireTool(t, "promtool", promtoolInstall)
	out, err := runTool(t, nil, promtool, "check", "rules", "prometheus/rules.yml")
	if err != nil || !strings.Contains(out, "SUCCESS") {
		t.Fatalf("promtool check rules prometheus/rules.yml: %v\n%s", err, out)
	}
}

func TestPromtoolTestRules(t *testing.T) {
	promtool := requireTool(t, "promtool", promtoolInstall)
	out, err := runTool(t, nil, promtool, "test", "rules", "prometheus/rules_test.yml")
	if err != nil || !strings.Contains(out, "SUCCESS") {
		t.Fatalf("promtool test rules prometheus/rules_test.yml: %v\n%s", err, out)
	}
}

// TestPromtoolCheckConfig checks the example scrape configuration offline; it also re-checks
// the rule file it names.
func TestPromtoolCheckConfig(t *testing.T) {
	promtool := requireTool(t, "promtool", promtoolInstall)
	out, err := runTool(t, nil, promtool, "check", "config", "prometheus/scrape.yml")
	if err != nil || !strings.Contains(out, "SUCCESS") {
		t.Fatalf("promtool check config prometheus/scrape.yml: %v\n%s", err, out)
	}
}

// TestRuleTestsCatchMutations shows that rules_test.yml can fail: each case breaks rules.yml in
// one way a careless edit could, and promtool test rules must then report a failure.
func TestRuleTestsCatchMutations(t *testing.T) {
	promtool := requireTool(t, "promtool", promtoolInstall)
	rules := string(readFile(t, "prometheus/rules.yml"))
	tests := []struct {
		name     string
		old, new string
	}{
		{"NIS above band pends too briefly", "expr: surmise_nis_window_mean > surmise_nis_band_upper\n        for: 15m", "expr: surmise_nis_window_mean > surmise_nis_band_upper\n        for: 5m"},
		{"NIS below band compares the wrong way", "surmise_nis_window_mean < surmise_nis_band_lower", "surmise_nis_window_mean > surmise_nis_band_lower"},
		{"stale threshold far too high", "surmise_measurement_age_seconds > 60", "surmise_measurement_age_seconds > 600"},
		{"slow signals taken for stopped ones", "rate(surmise_samples_received_total[5m]) == 0", "rate(surmise_samples_received_total[5m]) < 0.05"},
		{"overruns alert on a single overrun", "expr: rate(surmise_tick_overruns_total[5m]) > 0\n        for: 15m", "expr: rate(surmise_tick_overruns_total[5m]) > 0\n        for: 1m"},
		{"refused reloads forgotten once the gauge recovers", "surmise_gain_last_reload_success == 0\n            or\n", "surmise_gain_last_reload_success == 0\n            and\n"},
		{"bus alert with the wrong severity", "expr: surmise_bus_connected == 0\n        for: 2m\n        labels:\n          severity: critical", "expr: surmise_bus_connected == 0\n        for: 2m\n        labels:\n          severity: warning"},
		{"diverged alert counts every status", `increase(surmise_ticks_total{status="diverged"}[15m])`, `increase(surmise_ticks_total[15m])`},
		{"not-ready alert fires during start-up", "expr: surmise_ready == 0\n        for: 5m", "expr: surmise_ready == 0\n        for: 0m"},
		{"bias alert fires on a passing transient", "expr: surmise_sensor_bias != 0\n        for: 2m", "expr: surmise_sensor_bias != 0\n        for: 0m"},
		{"stuck alert pends too briefly", "expr: surmise_sensor_stuck == 1\n        for: 5m", "expr: surmise_sensor_stuck == 1\n        for: 1m"},
		{"lock-out alert never fires", "expr: surmise_sensor_locked_out == 1", "expr: surmise_sensor_locked_out == 2"},
		{"drop-out threshold catches slow sensors", "surmise_sensor_dropout_ratio > 0.5", "surmise_sensor_dropout_ratio > 0.3"},
		{"target-down alert matches every job", `up{job=~"surmise.*"} == 0`, `up == 0`},
		{"p90 recorded as p99", "histogram_quantile(0.99, sum by (estimator, le) (rate(surmise_tick_lateness_seconds_bucket", "histogram_quantile(0.9, sum by (estimator, le) (rate(surmise_tick_lateness_seconds_bucket"},
		{"status share not divided by the total", "/ ignoring (status) group_left", "* ignoring (status) group_left"},
		{"innovation RMS summed instead of averaged", "avg by (estimator, gains, output) (avg_over_time(surmise_innovation_rms[5m]))", "avg by (estimator, gains, output) (sum_over_time(surmise_innovation_rms[5m]))"},
		{"description loses the reminder", "Reminder: Surmise's estimates must not drive trips, interlocks or safety alarms; act on the plant's measured signals and its own protection.\n\n      - alert: SurmiseBusDisconnected", "\n\n      - alert: SurmiseBusDisconnected"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			if strings.Count(rules, tc.old) != 1 {
				t.Fatalf("the text to mutate occurs %d times in rules.yml, want once: %q", strings.Count(rules, tc.old), tc.old)
			}
			dir := t.TempDir()
			copyFiles(t, dir, "prometheus/rules_test.yml")
			mutated := strings.Replace(rules, tc.old, tc.new, 1)
			if err := os.WriteFile(filepath.Join(dir, "rules.yml"), []byte(mutated), 0o644); err != nil {
				t.Fatal(err)
			}
			out, err := runTool(t, nil, promtool, "test", "rules", filepath.Join(dir, "rules_test.yml"))
			if err == nil {
				t.Fatalf("promtool test rules passed on the mutated rules; the tests do not catch %q\n%s", tc.name, out)
			}
			if !strings.Contains(out, "FAILED") {
				t.Fatalf("promtool failed without reporting a failed test (a broken setup?): %v\n%s", err, out)
			}
		})
	}
}

// ruleFile is the part of a Prometheus rule file these tests read.
type ruleFile struct {
	Groups []struct {
		Name  string `yaml:"name"`
		Rules []struct {
			Record      string            `yaml:"record"`
			Alert       string            `yaml:"alert"`
			Expr        string            `yaml:"expr"`
			For         string            `yaml:"for"`
			Labels      map[string]string `yaml:"labels"`
			Annotations map[string]string `yaml:"annotations"`
		} `yaml:"rules"`
	} `yaml:"groups"`
}

// ruleTestFile is the part of a promtool test file these tests read.
type ruleTestFile struct {
	Tests []struct {
		Name          string `yaml:"name"`
		AlertRuleTest []struct {
			Alertname string `yaml:"alertname"`
			EvalTime  string `yaml:"eval_time"`
			ExpAlerts []any  `yaml:"exp_alerts"`
		} `yaml:"alert_rule_test"`
		PromQLExprTest []struct {
			Expr string `yaml:"expr"`
		} `yaml:"promql_expr_test"`
	} `yaml:"tests"`
}

// documentedMetrics reads the metric names table of DEVELOPERS.md: name → type column.
func documentedMetrics(t *testing.T) map[string]string {
	t.Helper()
	names := map[string]string{}
	nameRe := regexp.MustCompile("`(surmise_[a-z0-9_]+)`")
	sc := bufio.NewScanner(bytes.NewReader(readFile(t, "../DEVELOPERS.md")))
	for sc.Scan() {
		line := sc.Text()
		if !strings.HasPrefix(line, "| `surmise_") {
			continue
		}
		cells := strings.Split(line, "|")
		if len(cells) < 4 {
			t.Fatalf("DEVELOPERS.md: a metric row with fewer than three cells: %q", line)
		}
		for _, m := range nameRe.FindAllStringSubmatch(cells[1], -1) {
			names[m[1]] = strings.TrimSpace(cells[2])
		}
	}
	if len(names) < 20 {
		t.Fatalf("DEVELOPERS.md: found %d metric names, the table lists more; has its format changed?", len(names))
	}
	return names
}

// exprMetrics returns the metric and recording-rule names an expression selects, leaving out
// quoted strings, label names and function names (identifiers followed by "(" or inside
// a by/without/on/ignoring list).
func exprMetrics(expr string) []string {
	expr = regexp.MustCompile(`"[^"]*"`).ReplaceAllString(expr, `""`)
	expr = regexp.MustCompile(`\b(by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)`).ReplaceAllString(expr, "")
	expr = regexp.MustCompile(`\{[^}]*\}`).ReplaceAllString(expr, "")
	expr = regexp.MustCompile(`\[[^\]]*\]`).ReplaceAllString(expr, "")
	var out []string
	for _, loc := range regexp.MustCompile(`[a-zA-Z_:][a-zA-Z0-9_:]*`).FindAllStringIndex(expr, -1) {
		m := expr[loc[0]:loc[1]]
		if loc[0] > 0 && strings.ContainsAny(expr[loc[0]-1:loc[0]], "0123456789.") {
			continue // part of a number (1e-12)
		}
		if strings.HasPrefix(strings.TrimSpace(expr[loc[1]:]), "(") {
			continue // a function or aggregation
		}
		switch m {
		case "by", "without", "on", "ignoring", "group_left", "group_right", "bool", "and", "or", "unless":
			continue
		}
		out = append(out, m)
	}
	return out
}

// TestRulesFollowConventions checks rules.yml against DEVELOPERS.md and the house conventions:
// only documented metrics, level:metric:operations names, severity and the two annotations on
// every alert, and a firing and a silent test case for every alert.
func TestRulesFollowConventions(t *testing.T) {
	var rf ruleFile
	if err := yaml.Unmarshal(readFile(t, "prometheus/rules.yml"), &rf); err != nil {
		t.Fatalf("prometheus/rules.yml: %v", err)
	}
	var tf ruleTestFile
	if err := yaml.Unmarshal(readFile(t, "prometheus/rules_test.yml"), &tf); err != nil {
		t.Fatalf("prometheus/rules_test.yml: %v", err)
	}
	metrics := documentedMetrics(t)
	// The label names DEVELOPERS.md allows ("Metric names").
	labels := []string{"estimator", "output", "state", "gains", "signal", "reason", "result", "status"}

	recorded := map[string]bool{}
	var alerts []string
	for _, g := range rf.Groups {
		for _, r := range g.Rules {
			if r.Record != "" {
				recorded[r.Record] = true
			} else {
				alerts = append(alerts, r.Alert)
			}
		}
	}
	if len(recorded) == 0 || len(alerts) == 0 {
		t.Fatalf("rules.yml: %d recording rules and %d alerts; want some of each", len(recorded), len(alerts))
	}

	known := func(name string) bool {
		if recorded[name] || name == "up" {
			return true
		}
		if _, ok := metrics[name]; ok {
			return true
		}
		for _, suffix := range []string{"_bucket", "_sum", "_count"} {
			if base, ok := strings.CutSuffix(name, suffix); ok && metrics[base] == "histogram" {
				return true
			}
		}
		return false
	}
	recordName := regexp.MustCompile(`^([a-z_]+):([a-z0-9_]+):([a-z0-9_]+)$`)
	for _, g := range rf.Groups {
		for _, r := range g.Rules {
			id := r.Record + r.Alert
			for _, m := range exprMetrics(r.Expr) {
				if !known(m) {
					t.Errorf("%s: expression uses %q, which is neither in DEVELOPERS.md's metric table nor a recording rule", id, m)
				}
			}
			if r.Record != "" {
				parts := recordName.FindStringSubmatch(r.Record)
				if parts == nil {
					t.Errorf("recording rule %q is not named level:metric:operations", r.Record)
					continue
				}
				for _, l := range strings.Split(parts[1], "_") {
					if !slices.Contains(labels, l) {
						t.Errorf("recording rule %q: level label %q is not one of DEVELOPERS.md's labels %v", r.Record, l, labels)
					}
				}
				metric := parts[2]
				if !known(metric) && !known(metric+"_total") {
					t.Errorf("recording rule %q: metric part %q is not a documented metric (counters drop _total)", r.Record, metric)
				}
				continue
			}
			if s := r.Labels["severity"]; s != "critical" && s != "warning" {
				t.Errorf("alert %s: severity %q, want critical or warning", r.Alert, s)
			}
			for _, a := range []string{"summary", "description"} {
				if strings.TrimSpace(r.Annotations[a]) == "" {
					t.Errorf("alert %s: no %s annotation", r.Alert, a)
				}
			}
			d := r.Annotations["description"]
			if !strings.Contains(d, "Check first:") || !strings.Contains(d, "must not drive trips") {
				t.Errorf("alert %s: the description must say what to check first and that estimates must not drive trips:\n%s", r.Alert, d)
			}
		}
	}

	// Every alert fires in some test case and stays silent in another.
	fires, silent := map[string]bool{}, map[string]bool{}
	tested := map[string]bool{}
	for _, tc := range tf.Tests {
		for _, a := range tc.AlertRuleTest {
			if len(a.ExpAlerts) > 0 {
				fires[a.Alertname] = true
			} else {
				silent[a.Alertname] = true
			}
		}
		for _, e := range tc.PromQLExprTest {
			for _, m := range exprMetrics(e.Expr) {
				tested[m] = true
			}
		}
	}
	sort.Strings(alerts)
	for _, a := range alerts {
		if !fires[a] {
			t.Errorf("alert %s: no test case in rules_test.yml where it fires", a)
		}
		if !silent[a] {
			t.Errorf("alert %s: no test case in rules_test.yml where it stays silent", a)
		}
	}
	for r := range recorded {
		if !tested[r] {
			t.Errorf("recording rule %s: no promql_expr_test in rules_test.yml", r)
		}
	}
}

func TestExprMetrics(t *testing.T) {
	tests := []struct {
		expr string
		want []string
	}{
		{`surmise_nis_window_mean > surmise_nis_band_upper`, []string{"surmise_nis_window_mean", "surmise_nis_band_upper"}},
		{`histogram_quantile(0.99, sum by (estimator, le) (rate(surmise_tick_lateness_seconds_bucket[5m])))`, []string{"surmise_tick_lateness_seconds_bucket"}},
		{`up{job=~"surmise.*"} == 0`, []string{"up"}},
		{`a:b:c / ignoring (status) group_left sum by (estimator) (a:b:c)`, []string{"a:b:c", "a:b:c"}},
		{`sum without (result) (increase(x_total{result="refused"}[15m])) > 0 or y == bool 1`, []string{"x_total", "y"}},
		{`abs(a:b:p99 - 0.0185) < bool 1e-12`, []string{"a:b:p99"}},
	}
	for _, tc := range tests {
		if got := exprMetrics(tc.expr); !slices.Equal(got, tc.want) {
			t.Errorf("exprMetrics(%q) = %q, want %q", tc.expr, got, tc.want)
		}
	}
}
