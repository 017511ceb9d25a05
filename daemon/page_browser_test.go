package daemon_test

import (
	"context"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// chromiumPath returns the browser the page test drives. Without one the
// test skips, except in CI (CI=true), where .ci/run installs Debian's
// chromium and its absence is a failure.
func chromiumPath(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") == "true" {
		t.Fatal("no chromium (chromium, chromium-browser or google-chrome) on PATH; .ci/run installs Debian's chromium")
	}
	t.Skip("skipping the live page's browser test: no chromium (chromium, chromium-browser or google-chrome) on PATH")
	return ""
}

// pageFastDemo is the demo hot-water loop with its tick at ts instead of 1 s:
// the discrete model is the same, only the wall time of a tick changes, and
// the signals' max_age shrink in proportion. The gains file is the one
// checked against the plant file, with the new model's fingerprint.
func pageFastDemo(t *testing.T, ts time.Duration) daemon.PlantSpec {
	t.Helper()
	plant, gains := pageDemo(t)
	scale := ts.Seconds() / plant.Model.Ts
	cp := *plant
	md := *plant.Model
	md.Ts = ts.Seconds()
	cp.Model = &md
	scaled := func(ws []config.Wire) []config.Wire {
		out := append([]config.Wire(nil), ws...)
		for i := range out {
			out[i].MaxAge = time.Duration(float64(out[i].MaxAge) * scale)
		}
		return out
	}
	cp.Inputs, cp.Outputs = scaled(plant.Inputs), scaled(plant.Outputs)
	g := *gains
	g.Fingerprint = config.Fingerprint(cp.Model)
	return daemon.PlantSpec{Plant: &cp, Gains: &g}
}

// pageSamplePayload is the JSON sample of the bus: {"value": v, "time": t}.
func pageSamplePayload(dst []byte, v float64, at time.Time) []byte {
	dst = append(dst, `{"value":`...)
	dst = strconv.AppendFloat(dst, v, 'g', -1, 64)
	dst = append(dst, `,"time":"`...)
	dst = at.UTC().AppendFormat(dst, time.RFC3339Nano)
	return append(dst, `"}`...)
}

// pageSimulate publishes a seeded simulation of the plant on its subjects every
// sample time until ctx is done: the heater power as a square wave between
// 4.8 and 7.2 kW (40 samples each), and the two temperatures while sensors
// is true.
func pageSimulate(ctx context.Context, t *testing.T, nc *nats.Conn, spec daemon.PlantSpec, sensors *atomic.Bool) {
	md := spec.Plant.Model
	// The element 2 K above its operating point, for the estimator to find.
	x0 := append([]float64(nil), md.X0...)
	x0[0] += 2
	sim := estimator.NewPlant(md, 11, x0)
	_, _, p := md.Dims()
	u, y := []float64{md.U0[0]}, make([]float64, p)
	ts := time.Duration(md.Ts * float64(time.Second))
	tk := time.NewTicker(ts)
	defer tk.Stop()
	var buf []byte
	for k := 0; ; k++ {
		select {
		case <-ctx.Done():
			return
		case <-tk.C:
		}
		u[0] = 7.2
		if (k/40)%2 == 1 {
			u[0] = 4.8
		}
		sim.Step(u)
		sim.OutputTo(y)
		now := time.Now()
		buf = pageSamplePayload(buf[:0], u[0], now)
		if err := nc.Publish(spec.Plant.Inputs[0].Subject, buf); err != nil {
			t.Errorf("publishing the input: %v", err)
			return
		}
		if sensors.Load() {
			for j, w := range spec.Plant.Outputs {
				buf = pageSamplePayload(buf[:0], y[j], now)
				if err := nc.Publish(w.Subject, buf); err != nil {
					t.Errorf("publishing %s: %v", w.Signal, err)
					return
				}
			}
		}
	}
}

// TestPageInBrowser runs the daemon in-process on its embedded NATS server,
// with a simulated demo plant publishing on the plant's subjects, opens the
// live page in headless chromium, and checks what an operator would see:
// every chart gets data; the status is tracking while the sensors report
// and turns to coasting when they stop; pause freezes the view while data
// keeps arriving; a drag zooms every chart and a double-click undoes it; the
// shadow candidate shows beside the active gains, and its promotion in the
// audit trail; the page raises no script error and breaks no rule of its
// content security policy. It writes two screenshots and logs their paths.
func TestPageInBrowser(t *testing.T) {
	browser := chromiumPath(t)
	const ts = 200 * time.Millisecond
	spec := pageFastDemo(t, ts)

	epc := make(chan daemon.Endpoints, 1)
	d, err := daemon.New(daemon.Options{
		Plants:           []daemon.PlantSpec{spec},
		EmbeddedPort:     -1,
		Listen:           "127.0.0.1:0",
		ReloadDebounce:   -1,
		MinDwell:         -1,
		WatchdogInterval: -1,
		Notify:           func(string) error { return nil },
		Started:          func(ep daemon.Endpoints) { epc <- ep },
	})
	if err != nil {
		t.Fatal(err)
	}
	runCtx, stop := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(runCtx) }()
	t.Cleanup(func() {
		stop()
		if err := <-done; err != nil {
			t.Errorf("daemon: %v", err)
		}
	})
	var ep daemon.Endpoints
	select {
	case ep = <-epc:
	case err := <-done:
		t.Fatalf("daemon stopped at start-up: %v", err)
	case <-time.After(30 * time.Second):
		t.Fatal("daemon not started after 30 s")
	}

	nc, err := nats.Connect(ep.BusURL)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	var sensors atomic.Bool
	sensors.Store(true)
	simCtx, stopSim := context.WithCancel(context.Background())
	var simDone sync.WaitGroup
	simDone.Go(func() { pageSimulate(simCtx, t, nc, spec, &sensors) })
	t.Cleanup(func() { stopSim(); simDone.Wait() })

	// The browser, with a fresh profile and nothing it does on its own.
	profile := t.TempDir()
	allocCtx, cancelAlloc := chromedp.NewExecAllocator(context.Background(),
		chromedp.ExecPath(browser),
		chromedp.Flag("headless", true),
		chromedp.Flag("no-sandbox", true),
		chromedp.Flag("disable-gpu", true),
		chromedp.Flag("no-first-run", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.UserDataDir(profile),
		chromedp.WindowSize(1440, 900),
	)
	t.Cleanup(cancelAlloc)
	ctx, cancelTab := chromedp.NewContext(allocCtx)
	t.Cleanup(cancelTab)
	if err := chromedp.Do(ctx, chromedp.Navigate("about:blank")); err != nil {
		t.Fatalf("starting %s: %v", browser, err)
	}

	// Everything the page writes to the console; errors fail the test.
	var consoleMu sync.Mutex
	var problems []string
	consoleCtx, stopConsole := context.WithCancel(ctx)
	var consoleDone sync.WaitGroup
	consoleDone.Go(func() {
		for m, err := range chromedp.Console(consoleCtx) {
			if err != nil {
				return
			}
			if m.IsException() || m.Type == chromedp.ConsoleError {
				consoleMu.Lock()
				problems = append(problems, m.String()+" at "+m.URL+":"+strconv.FormatInt(m.Line+1, 10))
				consoleMu.Unlock()
			}
		}
	})
	defer func() {
		stopConsole()
		consoleDone.Wait()
		for _, p := range problems {
			t.Errorf("browser console: %s", p)
		}
	}()

	url := "http://" + ep.HTTPAddr.String() + "/"
	if err := chromedp.Do(ctx, chromedp.Navigate(url)); err != nil {
		t.Fatalf("opening %s: %v", url, err)
	}
	step := func(what string, a chromedp.Action[chromedp.Void]) {
		t.Helper()
		c, cancel := context.WithTimeout(ctx, 90*time.Second)
		defer cancel()
		if _, err := chromedp.Run(c, a); err != nil {
			t.Fatalf("%s: %v", what, err)
		}
	}
	eval := func(expr string) string {
		t.Helper()
		c, cancel := context.WithTimeout(ctx, 30*time.Second)
		defer cancel()
		v, err := chromedp.Run(c, chromedp.Evaluate[string](expr))
		if err != nil {
			t.Fatalf("evaluating %s: %v", expr, err)
		}
		return v
	}
	poll := func(what, expr string) {
		t.Helper()
		c, cancel := context.WithTimeout(ctx, 90*time.Second)
		defer cancel()
		if _, err := chromedp.Run(c, chromedp.Poll[bool](expr, chromedp.WithPollingTimeout(80*time.Second),
			chromedp.WithPollingInterval(100*time.Millisecond))); err != nil {
			t.Fatalf("waiting until %s (%s): %v; page: points %s, status %s", what, expr, err,
				eval(`document.documentElement.dataset.points || "none"`), eval(`document.documentElement.dataset.status || "none"`))
		}
	}
	screenshot := func(name string) {
		t.Helper()
		c, cancel := context.WithTimeout(ctx, 60*time.Second)
		defer cancel()
		png, err := chromedp.Run(c, chromedp.FullScreenshot(100))
		if err != nil {
			t.Fatalf("screenshot: %v", err)
		}
		path := filepath.Join(os.TempDir(), "surmise-live-page-"+name+".png")
		if err := os.WriteFile(path, png, 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("screenshot (%s): %s", name, path)
	}

	// 1. Data reaches every chart, and the estimator tracks.
	const points = 30
	root := `document.documentElement.dataset`
	poll("30 ticks are plotted and the status is tracking",
		`Number(`+root+`.points || 0) >= `+strconv.Itoa(points)+` && `+root+`.status === "tracking"`)
	// 1 status strip, 2 innovations, NIS, 2 outputs, 4 states, timing, ages.
	const charts = 12
	poll("every chart has its data",
		`[...document.querySelectorAll(".chart")].filter(e => Number(e.dataset.points || 0) >= `+strconv.Itoa(points)+`).length === `+strconv.Itoa(charts)+
			` && document.querySelectorAll(".chart canvas").length === `+strconv.Itoa(charts))
	if w := eval(`document.getElementById("badge-word").textContent`); w != "tracking" {
		t.Errorf("badge word %q, want tracking", w)
	}
	if n := eval(`String(document.getElementById("badge-icon").childElementCount)`); n == "0" {
		t.Error("the status badge has no shape")
	}
	// The shadow lane: the demo gains file runs kalman-current as candidate.
	poll("the candidate's NIS shows beside the active set's",
		`(() => { const r = [...document.querySelectorAll("#gains-table tr")].find(r => r.cells[0].textContent.startsWith("NIS window mean"));`+
			` return r && /^\d/.test(r.cells[1].textContent) && /^\d/.test(r.cells[2].textContent); })()`)
	// It fits the laptop's screen: nothing scrolls sideways.
	if wide := eval(`(() => { const w = document.documentElement.clientWidth;` +
		` return [...document.querySelectorAll("body *")].filter(e => e.getBoundingClientRect().right > w + 1)` +
		`.slice(0, 5).map(e => e.tagName + "." + e.className + " " + Math.round(e.getBoundingClientRect().right)).join(", "); })()`); wide != "" {
		t.Errorf("wider than the %s px window: %s", eval(`String(document.documentElement.clientWidth)`), wide)
	}
	// The caution is on the page, and says a status is the estimator's.
	if c := eval(`(document.querySelector(".caution") || {}).innerText || ""`); !strings.Contains(c, "not a safety function") || !strings.Contains(c, "not a process alarm") {
		t.Errorf("caution on the page: %q", c)
	}
	// With the cursor off the charts, the legends show the latest values,
	// not rows of dashes.
	if l := eval(`[...document.querySelectorAll(".u-legend")].map(e => e.innerText).join(" | ")`); !strings.Contains(l, "latest") || strings.Contains(l, "time: —") {
		t.Errorf("chart legends with the cursor off the charts: %q", l)
	}
	gains := eval(`document.getElementById("gains-table").innerText`)
	for _, want := range []string{"poles-prediction", "kalman-current", "innovation RMS, tank_outlet"} {
		if !strings.Contains(gains, want) {
			t.Errorf("gain sets table lacks %q:\n%s", want, gains)
		}
	}
	if s := eval(`document.getElementById("outputs-table").innerText`); !strings.Contains(s, "tank_outlet") || !strings.Contains(s, "hx_outlet") {
		t.Errorf("outputs table:\n%s", s)
	}
	// Each output's sensor indicators and its Ljung–Box whiteness over the
	// window, once the window holds enough innovations.
	poll("the outputs table judges each sensor and its whiteness",
		`[...document.querySelectorAll("#outputs-table tbody tr")].every(r => /^(ok|bias|stuck|locked)/.test(r.cells[8].textContent) && /white \(p /.test(r.cells[9].textContent))`)
	// The page's Ljung–Box statistic and p-value on the committed series
	// agree with numpy and scipy.stats.chi2.sf (SOURCES.md: ljung-box).
	var lbRef struct {
		LjungBox []struct {
			Name   string
			Series []float64
			Q, P   float64
		} `json:"ljung_box"`
	}
	if raw, err := os.ReadFile(filepath.Join("..", "testdata", "reference", "commissioning.json")); err != nil {
		t.Fatal(err)
	} else if err := json.Unmarshal(raw, &lbRef); err != nil {
		t.Fatal(err)
	}
	for _, c := range lbRef.LjungBox {
		series, _ := json.Marshal(c.Series)
		var got struct{ Q, P float64 }
		if err := json.Unmarshal([]byte(eval(`JSON.stringify(window.surmiseStats.ljungBox(`+string(series)+`, 10))`)), &got); err != nil {
			t.Fatalf("%s: %v", c.Name, err)
		}
		if math.Abs(got.Q-c.Q) > 1e-9*c.Q || math.Abs(got.P-c.P) > 1e-9*math.Max(c.P, 1e-6) {
			t.Errorf("%s: the page's Ljung–Box Q, p = %v, %v; scipy %v, %v", c.Name, got.Q, got.P, c.Q, c.P)
		}
	}

	// 2. Pause freezes the view while updates keep arriving; resume
	// catches up.
	step("pause", chromedp.Click("#pause"))
	frozen := eval(root + `.points`)
	updates, _ := strconv.Atoi(eval(root + `.updates`))
	poll("three updates arrive while paused", `Number(`+root+`.updates) >= `+strconv.Itoa(updates+3))
	if p := eval(root + `.points`); p != frozen {
		t.Errorf("paused view went from %s to %s points", frozen, p)
	}
	step("resume", chromedp.Click("#pause"))
	poll("the view catches up after resume", `Number(`+root+`.points) > `+frozen)

	// 3. Zoom: a drag across the NIS chart narrows every chart to that
	// span, and new data leaves it alone; a double-click shows the whole
	// history again, and the view follows the data once more.
	box := strings.Split(eval(`(() => { const o = document.querySelector('[data-chart="nis"] .u-over');`+
		` o.scrollIntoView({block: "center"}); const r = o.getBoundingClientRect();`+
		` return [r.left, r.top, r.width, r.height].join(","); })()`), ",")
	var b [4]float64
	for i := range b {
		if b[i], err = strconv.ParseFloat(box[i], 64); err != nil {
			t.Fatalf("chart box %v: %v", box, err)
		}
	}
	x1, x2, y := b[0]+0.3*b[2], b[0]+0.6*b[2], b[1]+0.5*b[3]
	before := eval(root + `.xrange`)
	step("drag across the NIS chart", chromedp.Steps(
		chromedp.MouseEvent(chromedp.MouseMoved, x1, y),
		chromedp.MouseEvent(chromedp.MousePressed, x1, y, chromedp.ButtonLeft, chromedp.ClickCount(1)),
		chromedp.MouseEvent(chromedp.MouseMoved, (x1+x2)/2, y, chromedp.ButtonLeft),
		chromedp.MouseEvent(chromedp.MouseMoved, x2, y, chromedp.ButtonLeft),
		chromedp.MouseEvent(chromedp.MouseReleased, x2, y, chromedp.ButtonLeft, chromedp.ClickCount(1)),
	))
	poll("the charts are zoomed", root+`.zoomed === "true"`)
	zoom := eval(root + `.xrange`)
	if zoom == before {
		t.Errorf("time range %s unchanged by the zoom", zoom)
	}
	if odd := eval(`String([...document.querySelectorAll(".chart")].filter(e => e.dataset.xrange !== ` + root + `.xrange).length)`); odd != "0" {
		t.Errorf("%s charts do not show the zoomed span %s", odd, zoom)
	}
	updates, _ = strconv.Atoi(eval(root + `.updates`))
	poll("three updates arrive while zoomed", `Number(`+root+`.updates) >= `+strconv.Itoa(updates+3))
	if r := eval(root + `.xrange`); r != zoom {
		t.Errorf("zoomed span moved from %s to %s with new data", zoom, r)
	}
	step("double-click", chromedp.MouseClickXY(x1, y, chromedp.ClickCount(2)))
	poll("the zoom is gone and the view follows the data",
		root+`.zoomed === "false" && `+root+`.xrange !== `+strconv.Quote(zoom))
	step("back to the top", chromedp.Evaluate[chromedp.Void](`window.scrollTo(0, 0)`))
	screenshot("tracking")

	// 4. The candidate is promoted: the page shows the new active set and
	// the swap in the audit trail.
	if _, err := d.Estimators()[0].Commissioner().Promote(daemon.PromoteRequest{}, daemon.Origin{Who: "the page's browser test"}); err != nil {
		t.Fatalf("promote: %v", err)
	}
	poll("the page shows the promotion", `document.getElementById("active-gains").textContent === "kalman-current"`+
		` && document.getElementById("audit-table").innerText.includes("promote")`)
	if a := eval(`document.getElementById("audit-table").innerText`); !strings.Contains(a, "poles-prediction → kalman-current") {
		t.Errorf("audit trail does not show the swap from poles-prediction to kalman-current:\n%s", a)
	}

	// 5. The sensors drop out: the estimator coasts, and the page says so.
	sensors.Store(false)
	poll("the status is coasting", root+`.status === "coasting" && document.getElementById("badge").dataset.status === "coasting"`)
	if w := eval(`document.getElementById("badge-word").textContent`); w != "coasting" {
		t.Errorf("badge word %q, want coasting", w)
	}
	// A few seconds of coasting on the strip before the picture.
	n, _ := strconv.Atoi(eval(root + `.points`))
	poll("15 more ticks are plotted", `Number(`+root+`.points) >= `+strconv.Itoa(n+15))
	screenshot("coasting")
}
