package drift

import (
	"context"
	"fmt"

	"trialogue/arms"
	"trialogue/arms/responder"
)

// Play plays every probe of a study against each of its arms' endpoints,
// runs times, the way a respondent's session would: the arm's rendered
// prompts, then the probe's replies one by one, each answered by the model.
func Play(ctx context.Context, def *arms.Study, responders map[string]responder.Responder, runs int) ([]Output, error) {
	var out []Output
	for _, pr := range def.Probes {
		resp := pr.Respondent(def)
		for _, armName := range def.ProbeArms(pr) {
			arm := def.Arms[armName]
			rsp, ok := responders[arm.Endpoint]
			if !ok {
				return nil, fmt.Errorf("probe %s, arm %s: no responder for endpoint %q", pr.Name, armName, arm.Endpoint)
			}
			e := def.Endpoints[arm.Endpoint]
			rendered, err := def.Render(armName, resp)
			if err != nil {
				return nil, fmt.Errorf("probe %s: %w", pr.Name, err)
			}
			params := responder.Params{Model: e.Model, Temperature: e.Temperature, TopP: e.TopP, MaxTokens: e.MaxTokens, Seed: e.Seed}
			for run := range runs {
				var msgs []responder.Message
				turn := 0
				ask := func() error {
					res, err := rsp.Respond(ctx, responder.Request{Arm: armName, System: rendered.System, Messages: msgs, Params: params}, nil)
					if err != nil {
						return fmt.Errorf("probe %s, arm %s, run %d, turn %d: %w", pr.Name, armName, run+1, turn, err)
					}
					out = append(out, Output{Probe: pr.Name, Arm: armName, Run: run, Turn: turn, Text: res.Text, ModelReported: res.ModelReported, Fingerprint: res.Fingerprint})
					msgs = append(msgs, responder.Message{Role: responder.RoleAssistant, Text: res.Text})
					turn++
					return nil
				}
				if arm.Kind == arms.KindMessage || arm.Opening {
					msgs = append(msgs, responder.Message{Role: responder.RoleUser, Text: rendered.Prompt})
					if err := ask(); err != nil {
						return nil, err
					}
				}
				if arm.Kind != arms.KindChat {
					continue
				}
				for _, reply := range pr.Replies {
					msgs = append(msgs, responder.Message{Role: responder.RoleUser, Text: reply})
					if err := ask(); err != nil {
						return nil, err
					}
				}
			}
		}
	}
	return out, nil
}

// Settings turns a study's drift settings into thresholds and a run count.
func Settings(def *arms.Study) (Thresholds, int) {
	th, runs := DefaultThresholds, 5
	d := def.Drift
	if d == nil {
		return th, runs
	}
	if d.Runs > 0 {
		runs = d.Runs
	}
	for _, x := range []struct {
		dst *float64
		src *float64
	}{{&th.ExactWarn, d.ExactWarn}, {&th.ExactFail, d.ExactFail}, {&th.SimilarityWarn, d.SimilarityWarn},
		{&th.SimilarityFail, d.SimilarityFail}, {&th.KSWarn, d.KSWarn}, {&th.KSFail, d.KSFail}} {
		if x.src != nil {
			*x.dst = *x.src
		}
	}
	return th, runs
}
