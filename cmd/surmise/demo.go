package main

import (
	"context"
	_ "embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/simplant"
)

// The demo plant and its gains, built in so that the demo runs from any
// directory. They are copies of testdata/plants/hotwater-loop.yaml and
// hotwater-loop.gains.yaml (a test checks that they are the same bytes; to
// refresh them, copy those files to cmd/surmise/demo/).
var (
	//go:embed demo/hotwater-loop.yaml
	demoPlantYAML []byte
	//go:embed demo/hotwater-loop.gains.yaml
	demoGainsYAML []byte
)

const demoSynopsis = `[flags]

Runs the whole tool on the invented 40-litre hot-water loop, with no other
service: an in-process NATS server on a loopback port, the simulated plant
publishing its heater power, two temperatures and its true hidden states with
the built-in rehearsal scenario (PRBS and steps on the heater, a sensor
dropout, a bias, spikes, a slow sensor, jittered arrival), and the daemon of
'surmise run' estimating it — the placed prediction-form gains active, the
steady-state Kalman current-form gains in shadow — with its metrics, health
and live page on --listen. Every few seconds a line shows the status, the
windowed NIS and a hidden state estimated against the truth.

Runs until interrupted, or for --for. --speed runs the plant, and the
daemon's ticks with it, that many times faster than real time.`

type demoFlags struct {
	listen        string
	natsPort      int
	length, every time.Duration
	speed         float64
	seed          uint64
	verbose       bool
}

func runDemo(ctx context.Context, e *env, args []string) error {
	fs := newFlags(e, "demo", demoSynopsis)
	var f demoFlags
	fs.StringVar(&f.listen, "listen", daemon.DefaultHTTPAddr, "HTTP `ADDRESS` of the live page, /metrics, /healthz and /readyz")
	fs.IntVar(&f.natsPort, "nats-port", 0, "loopback `PORT` of the NATS server (default: 4222 when free, else any; -1 any)")
	fs.DurationVar(&f.length, "for", 0, "stop after this `DURATION`, such as 30s (default: until interrupted)")
	fs.DurationVar(&f.every, "every", 5*time.Second, "print a status line every `DURATION`")
	fs.Float64Var(&f.speed, "speed", 1, "time `SCALE`: the plant and the daemon run this many times faster than real time")
	fs.Uint64Var(&f.seed, "seed", 1, "`SEED` of the simulated plant's noise")
	fs.BoolVar(&f.verbose, "verbose", false, "log the daemon's messages on standard error")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	switch {
	case len(pos) != 0:
		return usageError("the demo takes no arguments, got %q", pos)
	case !(f.speed > 0) || f.speed > 1000:
		return usageError("--speed %v: want a positive scale, at most 1000", f.speed)
	case f.length < 0:
		return usageError("--for %v: want a positive duration", f.length)
	case f.every <= 0:
		return usageError("--every %v: want a positive duration", f.every)
	}
	began := time.Now()

	plant, gains, err := demoPlant()
	if err != nil {
		return err
	}
	sc, err := simplant.Builtin("rehearsal", plant)
	if err != nil {
		return err
	}
	sim, err := simplant.New(plant, sc, simplant.Options{Seed: f.seed})
	if err != nil {
		return err
	}
	// The daemon ticks at the plant's pace: its sample time and max_age
	// divided by the speed (the discrete model, and so the gains, unchanged).
	runPlant, runGains := simplant.TimeScaled(plant, gains, f.speed)

	if f.length > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, f.length)
		defer cancel()
	}
	state, err := os.MkdirTemp("", "surmise-demo-")
	if err != nil {
		return err
	}
	defer os.RemoveAll(state)
	log := slog.New(slog.DiscardHandler)
	if f.verbose {
		log = slog.New(slog.NewTextHandler(e.stderr, &slog.HandlerOptions{Level: slog.LevelInfo}))
	}
	started := make(chan daemon.Endpoints, 1)
	d, err := daemon.New(daemon.Options{
		Plants:           []daemon.PlantSpec{{Plant: runPlant, Gains: runGains, GainsBytes: demoGainsYAML}},
		Bus:              daemon.BusOptions{Name: "surmise-demo-daemon"},
		EmbeddedPort:     f.natsPort, // the daemon's own server, locked as `surmise run` locks it
		Listen:           f.listen,
		Logger:           log,
		StateDir:         state,
		Notify:           func(string) error { return nil }, // not a service
		WatchdogInterval: -1,
		ReloadDebounce:   -1, // the files are built in: nothing to watch
		Started:          func(ep daemon.Endpoints) { started <- ep },
	})
	if err != nil {
		return err
	}
	runCtx, stopDaemon := context.WithCancel(context.Background())
	defer stopDaemon()
	runErr := make(chan error, 1)
	go func() { runErr <- d.Run(runCtx) }()
	var ep daemon.Endpoints
	select {
	case ep = <-started:
	case err := <-runErr:
		return err
	}

	// The simulated plant and the watch log in as the local user, whose
	// password the daemon wrote beside its server's URL: anonymous clients
	// of the demo's server have only what they have on any embedded server.
	user, password, err := daemon.ReadUserFile(filepath.Join(ep.LocalAccess, daemon.LocalUserFile))
	if err != nil {
		return fmt.Errorf("the demo's own access to its server: %w", err)
	}
	nc, err := nats.Connect(ep.BusURL, nats.UserInfo(user, password), nats.Name("surmise-demo"))
	if err != nil {
		return err
	}
	defer nc.Close()
	w := newDemoWatch(plant)
	estSubj := daemon.EstimateSubject(plant)
	shadowSubj := daemon.ShadowSubject(estSubj)
	for subj, lane := range map[string]*demoLane{estSubj: &w.active, shadowSubj: &w.shadow} {
		if _, err := nc.Subscribe(subj, func(m *nats.Msg) { w.estimate(lane, m.Data) }); err != nil {
			return err
		}
	}
	if err := nc.Flush(); err != nil {
		return err
	}
	describeDemo(e.stdout, plant, gains, ep, f, time.Since(began))

	simCtx, stopSim := context.WithCancel(ctx)
	defer stopSim()
	simDone := make(chan error, 1)
	simStart := time.Now()
	go func() {
		_, err := simplant.Publish(simCtx, nc, simplant.NewStream(sim), simplant.PublishOptions{
			Clock:     simplant.Clock{Start: simStart, Speed: f.speed},
			Published: w.published,
		})
		simDone <- err
	}()

	tick := time.NewTicker(f.every)
	defer tick.Stop()
	var failed error
loop:
	for {
		select {
		case <-ctx.Done():
			break loop
		case err := <-runErr:
			failed = fmt.Errorf("the daemon stopped: %w", err)
			runErr <- nil
			break loop
		case <-tick.C:
			w.line(e.stdout, time.Duration(float64(time.Since(simStart))*f.speed))
		}
	}
	stopSim()
	if err := <-simDone; err != nil && failed == nil {
		failed = err
	}
	stopDaemon()
	if err := <-runErr; err != nil && failed == nil {
		failed = err
	}
	active, shadow := w.counts()
	fmt.Fprintf(e.stdout, "stopped after %v: %d estimates published on %s, %d on %s\n",
		time.Since(simStart).Round(time.Millisecond), active, estSubj, shadow, shadowSubj)
	if failed == nil && errors.Is(ctx.Err(), context.DeadlineExceeded) && active == 0 {
		failed = errors.New("no estimate was published")
	}
	return failed
}

// demoPlant parses the built-in plant and gains files.
func demoPlant() (*config.Plant, *config.GainsFile, error) {
	plant, err := config.ParsePlant("hotwater-loop.yaml (built in)", demoPlantYAML)
	if err != nil {
		return nil, nil, err
	}
	gains, err := config.ParseGains("hotwater-loop.gains.yaml (built in)", demoGainsYAML, plant)
	if err != nil {
		return nil, nil, err
	}
	return plant, gains, nil
}

// describeDemo prints what runs and where.
func describeDemo(w io.Writer, plant *config.Plant, gains *config.GainsFile, ep daemon.Endpoints, f demoFlags, took time.Duration) {
	fmt.Fprintf(w, "surmise demo: the invented 40-litre hot-water loop, simulated and estimated (started in %v)\n", took.Round(time.Millisecond))
	fmt.Fprintf(w, "NATS      %s (in-process server, loopback only; control and JetStream need the local user)\n", ep.BusURL)
	ts := time.Duration(plant.Model.Ts * float64(time.Second))
	speed := ""
	if f.speed != 1 {
		speed = fmt.Sprintf(", %g times faster than real time (one sample every %v)", f.speed, time.Duration(float64(ts)/f.speed))
	}
	fmt.Fprintf(w, "plant     sample time %v%s, scenario rehearsal (2 min, repeated), seed %d\n", ts, speed, f.seed)
	for _, wi := range plant.Inputs {
		fmt.Fprintf(w, "            input  %-13s on %s\n", wi.Signal, wi.Subject)
	}
	for _, wi := range plant.Outputs {
		fmt.Fprintf(w, "            output %-13s on %s\n", wi.Signal, wi.Subject)
	}
	fmt.Fprintf(w, "            truth  every state   on %s\n", plant.TruthSubject("<state>"))
	est := daemon.EstimateSubject(plant)
	fmt.Fprintf(w, "estimator %s: active %q on %s\n", plant.Name, gains.Active, est)
	if gains.Candidate != "" {
		fmt.Fprintf(w, "            shadow %q on %s\n", gains.Candidate, daemon.ShadowSubject(est))
	}
	fmt.Fprintf(w, "HTTP      http://%s/  (live page)   /metrics   /healthz   /readyz\n", ep.HTTPAddr)
	fmt.Fprintf(w, "watch     nats sub --server %s '%s'   (any NATS client, no credentials: estimates are readable by all local clients)\n", ep.BusURL, est)
	if f.speed == 1 {
		fmt.Fprintf(w, "record    surmise record --subjects 'pilot.hwl.>,%s' --out demo.jsonl   (finds the server and its local user by itself)\n", plant.TruthSubject(">"))
		fmt.Fprintf(w, "replay    surmise replay testdata/plants/hotwater-loop.yaml --data demo.jsonl --report demo.html\n")
	}
	how := "interrupt (Ctrl-C) to stop"
	if f.length > 0 {
		how = fmt.Sprintf("stops after %v", f.length)
	}
	fmt.Fprintf(w, "caution   an invented plant. On a real one, estimates are a model's inference, not measurements: an estimator is\n")
	fmt.Fprintf(w, "          not a safety function; interlocks and trips act on measured signals; follow local codes and licensed practice.\n")
	fmt.Fprintf(w, "every %v: plant time, status (the estimator's own, not a process alarm), windowed NIS mean [95 %% band], a hidden state estimated (± 1σ) and true; %s\n", f.every, how)
}

// demoWatch keeps what the demo's lines show: the latest estimate of each
// lane, from the bus, and the latest true states, from the simulation.
type demoWatch struct {
	state, unit string // the hidden state shown
	stateIdx    int

	mu     sync.Mutex
	active demoLane
	shadow demoLane
	// truth holds the latest true values of the state shown with their
	// sample times, to find the one an estimate's tick saw.
	truth [64]demoTruth
	next  int
}

type demoTruth struct {
	at    time.Time
	value float64
}

// demoLane is the latest estimate published on one subject.
type demoLane struct {
	n        int
	status   string
	gains    string
	nisMean  *float64
	band     [2]*float64
	value    *float64
	std      *float64
	time     time.Time
	step     time.Duration // between its last two estimates
	received bool
}

func newDemoWatch(plant *config.Plant) *demoWatch {
	w := &demoWatch{state: stateName(plant, 0), unit: stateUnit(plant, 0)}
	for i, s := range plant.Model.States {
		if s.Name == "element_temp" {
			w.state, w.unit, w.stateIdx = s.Name, s.Unit, i
		}
	}
	return w
}

// demoEstimate is the part of an estimate's JSON the demo reads.
type demoEstimate struct {
	Time    time.Time  `json:"time"`
	Status  string     `json:"status"`
	Gains   string     `json:"gains"`
	NISMean *float64   `json:"nis_mean"`
	NISBand []*float64 `json:"nis_band"`
	States  map[string]struct {
		Value *float64 `json:"value"`
		Std   *float64 `json:"std"`
	} `json:"states"`
}

func (w *demoWatch) estimate(l *demoLane, data []byte) {
	var est demoEstimate
	if err := json.Unmarshal(data, &est); err != nil {
		return
	}
	w.mu.Lock()
	defer w.mu.Unlock()
	l.n++
	if l.received {
		l.step = est.Time.Sub(l.time)
	}
	l.received = true
	l.status, l.gains, l.nisMean, l.time = est.Status, est.Gains, est.NISMean, est.Time
	if len(est.NISBand) == 2 {
		l.band = [2]*float64{est.NISBand[0], est.NISBand[1]}
	}
	s := est.States[w.state]
	l.value, l.std = s.Value, s.Std
}

func (w *demoWatch) published(m *simplant.Message, _ []byte, at time.Time) {
	if m.Role != simplant.Truth || m.Index != w.stateIdx {
		return
	}
	w.mu.Lock()
	w.truth[w.next%len(w.truth)] = demoTruth{at: at, value: m.Value}
	w.next++
	w.mu.Unlock()
}

// truthAt returns the true value of the latest sample at or before t.
func (w *demoWatch) truthAt(t time.Time) (float64, bool) {
	best, found := demoTruth{}, false
	for i := range min(w.next, len(w.truth)) {
		tr := w.truth[i]
		if !tr.at.After(t) && (!found || tr.at.After(best.at)) {
			best, found = tr, true
		}
	}
	return best.value, found
}

// running reports whether the shadow lane l still publishes: its latest
// estimate is at most two ticks older than the active lane's.
func (l *demoLane) running(active *demoLane) bool {
	return l.received && !active.time.After(l.time.Add(2*max(active.step, 0)))
}

func (w *demoWatch) counts() (active, shadow int) {
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.active.n, w.shadow.n
}

// line prints one compact line.
func (w *demoWatch) line(out io.Writer, plantTime time.Duration) {
	w.mu.Lock()
	defer w.mu.Unlock()
	num := func(p *float64, digits int) string {
		if p == nil || math.IsNaN(*p) {
			return "–"
		}
		return fmt.Sprintf("%.*f", digits, *p)
	}
	lane := func(l *demoLane) string {
		if !l.received {
			return "no estimate yet"
		}
		return fmt.Sprintf("%-11s NIS %s [%s, %s]", l.status, num(l.nisMean, 2), num(l.band[0], 2), num(l.band[1], 2))
	}
	var b strings.Builder
	fmt.Fprintf(&b, "%6ds  %s  %s %s", int64(plantTime/time.Second), lane(&w.active), w.state, num(w.active.value, 2))
	if w.active.std != nil {
		fmt.Fprintf(&b, " ± %s", num(w.active.std, 2))
	}
	fmt.Fprintf(&b, " %s", w.unit)
	if v, ok := w.truthAt(w.active.time); ok && w.active.received {
		fmt.Fprintf(&b, " (true %.2f)", v)
	}
	switch {
	case w.shadow.running(&w.active):
		fmt.Fprintf(&b, "  | shadow %s %s", w.shadow.gains, lane(&w.shadow))
	case w.shadow.received:
		// It stopped: a promotion made it active, or a load dropped it.
		fmt.Fprintf(&b, "  | no shadow set running")
	}
	fmt.Fprintln(out, b.String())
}
