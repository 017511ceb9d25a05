package simplant

import (
	"context"
	"encoding/csv"
	"fmt"
	"io"
	"strconv"
	"time"

	"surmise/config"
	"surmise/daemon/recording"
)

// AppendPayload appends the JSON payload of a sample, {"value": v, "time":
// t in RFC 3339 with nanoseconds, UTC}, to dst.
func AppendPayload(dst []byte, v float64, t time.Time) []byte {
	dst = append(dst, `{"value":`...)
	dst = strconv.AppendFloat(dst, v, 'g', -1, 64)
	dst = append(dst, `,"time":"`...)
	dst = t.UTC().AppendFormat(dst, time.RFC3339Nano)
	return append(dst, `"}`...)
}

// Clock maps the times of a run (offsets from its start, in plant time) to
// wall-clock times: wall(d) = Start + d/Speed.
type Clock struct {
	Start time.Time
	Speed float64 // > 0; 1 is real time, 10 ten times faster
}

// Wall returns the wall-clock time of run time d.
func (c Clock) Wall(d time.Duration) time.Time {
	if c.Speed == 1 {
		return c.Start.Add(d)
	}
	return c.Start.Add(time.Duration(float64(d) / c.Speed))
}

// Conn is what Publish needs of a bus connection; *nats.Conn has it.
type Conn interface {
	Publish(subject string, data []byte) error
}

// PublishOptions are the settings of Publish.
type PublishOptions struct {
	// Clock gives each message its wall-clock times. A zero Start means the
	// time Publish starts; a zero Speed means 1 (real time).
	Clock Clock
	// For is how much plant time to run: messages of samples before For are
	// published. Zero means until ctx is done.
	For time.Duration
	// Prefix, when not empty, is put before every subject: "sim." publishes
	// pilot.hwl.tt110.pv as sim.pilot.hwl.tt110.pv, out of the way of the
	// plant's real subjects.
	Prefix string
	// Published, when not nil, is called after each message is handed to
	// the connection, with the message, its payload and its wall-clock
	// sample time; it must be quick.
	Published func(m *Message, payload []byte, at time.Time)
}

// Stats counts what Publish or WriteRecording sent.
type Stats struct {
	Samples  int // samples with a message sent (the last one's number + 1)
	Messages [Truth + 1]int
	Failed   int // publishes the connection refused (while it was down)
}

// Publish sends the stream's messages to the bus at their arrival times,
// until opts.For of plant time has been published or ctx is done (then it
// returns nil). A message the connection refuses (it is reconnecting, say)
// is counted and dropped, as a sensor's reading is lost in an outage.
func Publish(ctx context.Context, nc Conn, st *Stream, opts PublishOptions) (Stats, error) {
	clk := opts.Clock
	if clk.Start.IsZero() {
		clk.Start = time.Now()
	}
	if clk.Speed == 0 {
		clk.Speed = 1
	}
	if !(clk.Speed > 0) {
		return Stats{}, fmt.Errorf("simplant: speed %v: want a positive number", clk.Speed)
	}
	var stats Stats
	var payload []byte
	prefixed := map[string]string{}
	timer := time.NewTimer(time.Hour)
	timer.Stop()
	defer timer.Stop()
	for {
		m := st.Next()
		if opts.For > 0 && m.At >= opts.For {
			if m.Arrival() >= opts.For+st.sim.maxDelay {
				return stats, nil // every later message has a later sample time
			}
			continue
		}
		due := clk.Wall(m.Arrival())
		if wait := time.Until(due); wait > 0 {
			timer.Reset(wait)
			select {
			case <-ctx.Done():
				return stats, nil
			case <-timer.C:
			}
		} else if ctx.Err() != nil {
			return stats, nil
		}
		at := clk.Wall(m.At)
		payload = AppendPayload(payload[:0], m.Value, at)
		subject := m.Subject
		if opts.Prefix != "" {
			p, ok := prefixed[subject]
			if !ok {
				p = opts.Prefix + subject
				prefixed[subject] = p
			}
			subject = p
		}
		if err := nc.Publish(subject, payload); err != nil {
			stats.Failed++
			continue
		}
		stats.Messages[m.Role]++
		stats.Samples = max(stats.Samples, m.K+1)
		if opts.Published != nil {
			opts.Published(&m, payload, at)
		}
	}
}

// WriteRecording writes the messages of the stream's samples before length
// (plant time) as a bus recording, at once: each message's receive time is
// its arrival time on clk, its payload as Publish sends it. The same seed,
// scenario and clock give the same bytes.
func WriteRecording(w *recording.Writer, st *Stream, clk Clock, length time.Duration) (Stats, error) {
	if clk.Speed == 0 {
		clk.Speed = 1
	}
	var stats Stats
	var payload []byte
	for {
		m := st.Next()
		if m.At >= length {
			if m.Arrival() >= length+st.sim.maxDelay {
				return stats, nil // every later message has a later sample time
			}
			continue
		}
		payload = AppendPayload(payload[:0], m.Value, clk.Wall(m.At))
		if err := w.Write(clk.Wall(m.Arrival()), m.Subject, payload); err != nil {
			return stats, err
		}
		stats.Messages[m.Role]++
		stats.Samples = max(stats.Samples, m.K+1)
	}
}

// WriteCSV writes the samples before length (plant time) of sim as a
// historian-style CSV: a "time" column (RFC 3339 with nanoseconds, UTC, the
// sample's time on clk), one column per input and output (blank where the
// scenario drops a sample), then one column per true state (config.TruthColumn).
// A historian stores sample times, so jitter does not show.
func WriteCSV(w io.Writer, sim *Sim, clk Clock, length time.Duration) (Stats, error) {
	if clk.Speed == 0 {
		clk.Speed = 1
	}
	cw := csv.NewWriter(w)
	header := []string{"time"}
	header = append(header, sim.names[:sim.m+sim.p]...)
	for _, name := range sim.names[sim.m+sim.p:] {
		header = append(header, config.TruthColumn(name))
	}
	if err := cw.Write(header); err != nil {
		return Stats{}, fmt.Errorf("simplant: writing CSV: %w", err)
	}
	var stats Stats
	row := make([]string, len(header))
	var buf []Message
	for sim.NextAt() < length {
		buf = sim.Step(buf[:0])
		for i := range row {
			row[i] = ""
		}
		row[0] = clk.Wall(buf[0].At).UTC().Format(time.RFC3339Nano)
		for _, m := range buf {
			col := 1 + m.Index
			switch m.Role {
			case Output:
				col += sim.m
			case Truth:
				col += sim.m + sim.p
			}
			row[col] = strconv.FormatFloat(m.Value, 'g', -1, 64)
			stats.Messages[m.Role]++
		}
		if err := cw.Write(row); err != nil {
			return stats, fmt.Errorf("simplant: writing CSV: %w", err)
		}
		stats.Samples++
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return stats, fmt.Errorf("simplant: writing CSV: %w", err)
	}
	return stats, nil
}
