package main

import (
	"encoding/json"
	"fmt"
	"io"
	"math"
	"sort"
	"strings"
	"text/tabwriter"
	"time"

	"surmise/daemon"
)

// How ctl prints the daemon's replies: the status table, the jump a
// promote or a reset would make, and the words for a NIS mean against its
// band.

// ctlPrintReply prints a reply for people.
func ctlPrintReply(w io.Writer, verb string, data []byte) error {
	decode := func(v any) error {
		if err := json.Unmarshal(data, v); err != nil {
			return fmt.Errorf("the daemon's reply is not what this version understands: %w", err)
		}
		return nil
	}
	switch verb {
	case daemon.VerbStatus:
		var r daemon.StatusReply
		if err := decode(&r); err != nil {
			return err
		}
		ctlPrintStatus(w, &r)
	case daemon.VerbLoad:
		var r daemon.LoadReply
		if err := decode(&r); err != nil {
			return err
		}
		fmt.Fprintf(w, "loaded (sha256 %s): %s\n", ctlShort(r.SHA256), r.Note)
	case daemon.VerbPromote:
		var r daemon.PromoteReply
		if err := decode(&r); err != nil {
			return err
		}
		if r.Jump != nil {
			ctlPrintJump(w, r.Jump, "candidate")
		}
		if !r.Applied {
			fmt.Fprintf(w, "not applied: adopting %s's state moves the estimate by %s (above); run again with --yes to apply\n", r.Active.Name, fnum(r.Jump.Norm))
			return nil
		}
		fmt.Fprintf(w, "promoted (%s): %s\n", r.Transfer, r.Note)
	case daemon.VerbRollback:
		var r daemon.RollbackReply
		if err := decode(&r); err != nil {
			return err
		}
		fmt.Fprintf(w, "rolled back: %s\n", r.Note)
	case daemon.VerbReset:
		var r daemon.ResetReply
		if err := decode(&r); err != nil {
			return err
		}
		if r.Jump != nil {
			ctlPrintJump(w, r.Jump, "reset")
		}
		if !r.Applied {
			if r.Jump != nil {
				fmt.Fprintf(w, "not applied: the reset moves the estimate by %s (above); run again with --yes to apply\n", fnum(r.Jump.Norm))
			} else {
				fmt.Fprintln(w, "not applied (no estimate to compare with yet); run again with --yes to apply")
			}
			return nil
		}
		names := make([]string, 0, len(r.State))
		for n := range r.State {
			names = append(names, n)
		}
		sort.Strings(names)
		parts := make([]string, len(names))
		for i, n := range names {
			parts[i] = n + "=" + fnum(r.State[n])
		}
		fmt.Fprintf(w, "reset: %s (%s)\n", r.Note, strings.Join(parts, " "))
	}
	return nil
}

func ctlShort(sum string) string {
	if len(sum) > 12 {
		return sum[:12]
	}
	return sum
}

func ctlSet(r *daemon.SetRef) string {
	if r == nil {
		return "—"
	}
	return r.Name + " (" + r.Form + ")"
}

func ctlNum(n daemon.Number) string {
	if math.IsNaN(float64(n)) {
		return "—"
	}
	return fnum(float64(n))
}

func ctlPrintStatus(w io.Writer, r *daemon.StatusReply) {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "estimator\t%s\n", r.Estimator)
	fmt.Fprintf(tw, "model\t%s\n", r.Model)
	fmt.Fprintf(tw, "active\t%s\n", ctlSet(&r.Active))
	fmt.Fprintf(tw, "candidate\t%s\n", ctlSet(r.Candidate))
	fmt.Fprintf(tw, "previous\t%s\n", ctlSet(r.Previous))
	fmt.Fprintf(tw, "gains from\t%s (sha256 %s)\n", r.Source, ctlShort(r.SHA256))
	if lr := r.LastReload; lr != nil {
		fmt.Fprintf(tw, "last reload\t%s %s by %s: %s\n", lr.Time.Local().Format(time.DateTime), lr.Result, lr.Trigger, lr.Reason)
		for _, d := range lr.Detail {
			fmt.Fprintf(tw, "\t  %s\n", d)
		}
	} else {
		fmt.Fprintf(tw, "last reload\tnone since start\n")
	}
	if r.RestartNeeded != "" {
		fmt.Fprintf(tw, "restart\t%s\n", r.RestartNeeded)
	}
	dwell := fmt.Sprintf("%s s between swaps", fnum(r.MinDwell))
	if r.DwellLeft > 0 {
		dwell += fmt.Sprintf(", %s s left", fnum(r.DwellLeft))
	}
	fmt.Fprintf(tw, "dwell\t%s\n", dwell)
	for _, l := range []struct {
		what string
		s    *daemon.LaneStatus
	}{{"tick", r.Tick}, {"shadow", r.Shadow}} {
		if l.s == nil {
			continue
		}
		fmt.Fprintf(tw, "%s\t#%d %s %s: %s, %s\n", l.what, l.s.Seq, l.s.Time.Local().Format(time.TimeOnly), l.s.Gains,
			l.s.Status, nisWords(float64(l.s.NISMean), float64(l.s.NISBand[0]), float64(l.s.NISBand[1])))
	}
	tw.Flush()
	if r.Tick != nil {
		fmt.Fprintln(w, "\nstates")
		tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		head := "  name\tunit\t" + r.Tick.Gains + "\t±"
		if r.Shadow != nil {
			head += "\t" + r.Shadow.Gains + "\t±"
		}
		fmt.Fprintln(tw, head)
		for i, s := range r.Tick.States {
			line := fmt.Sprintf("  %s\t%s\t%s\t%s", s.Name, s.Unit, ctlNum(s.Value), ctlNum(s.Std))
			if r.Shadow != nil && i < len(r.Shadow.States) {
				line += fmt.Sprintf("\t%s\t%s", ctlNum(r.Shadow.States[i].Value), ctlNum(r.Shadow.States[i].Std))
			}
			fmt.Fprintln(tw, line)
		}
		tw.Flush()
	}
	if len(r.Audit) > 0 {
		fmt.Fprintln(w, "\naudit (latest last)")
		tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, a := range r.Audit {
			who := a.Origin
			if a.ClaimedBy != "" {
				who += " (says " + a.ClaimedBy + ")"
			}
			fmt.Fprintf(tw, "  %s\t%s\t%s\t%s → %s\t%s\n", a.Time.Local().Format(time.DateTime), a.Action, a.Trigger, a.OldActive.Name, a.NewActive.Name, who)
		}
		tw.Flush()
	}
}

// ctlPrintJump prints the jump from the active estimate to to (the
// candidate's estimate, or the state of a reset).
func ctlPrintJump(w io.Writer, j *daemon.Jump, to string) {
	fmt.Fprintf(w, "jump at tick #%d: ‖x̂_%s − x̂_active‖ = %s\n", j.Seq, to, fnum(j.Norm))
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "  state\tunit\tactive\t%s\tdifference\tin active σ\n", to)
	for _, s := range j.States {
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\t%s\n", s.Name, s.Unit, fnum(s.Active), fnum(s.Candidate), fnum(s.Difference), ctlNum(s.Sigmas))
	}
	tw.Flush()
}

// nisWords says where a windowed NIS mean lies against its 95 % band:
// "NIS window mean 1.02, inside its 95 % band [0.81, 1.21]", "… below its
// 95 % band …", "… above …", or why there is none.
func nisWords(mean, lo, hi float64) string {
	band := fmt.Sprintf("its 95 %% band [%s, %s]", fnum(lo), fnum(hi))
	switch {
	case math.IsNaN(mean):
		return "no NIS window mean yet (or no S in this gain set)"
	case math.IsNaN(lo) || math.IsNaN(hi):
		return fmt.Sprintf("NIS window mean %s, no band yet", fnum(mean))
	case mean < lo:
		return fmt.Sprintf("NIS window mean %s, below %s", fnum(mean), band)
	case mean > hi:
		return fmt.Sprintf("NIS window mean %s, above %s", fnum(mean), band)
	}
	return fmt.Sprintf("NIS window mean %s, inside %s", fnum(mean), band)
}
