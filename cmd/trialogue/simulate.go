package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"time"

	"trialogue/arms"
	"trialogue/arms/responder"
	"trialogue/server/simulate"
)

// runSimulate drives synthetic respondents through a running server.
//
//	trialogue simulate --url URL --study ID --respondents N --concurrency C
//	  [--personas FILE] [--persona-endpoint NAME --study-file FILE]
//	  [--think-time D] [--report FILE] [--max-time D] [--seed N]
func runSimulate(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue simulate", flag.ContinueOnError)
	fs.SetOutput(stderr)
	var cfg simulate.Config
	fs.StringVar(&cfg.URL, "url", "http://127.0.0.1:8080", "the server's `address` (loopback only)")
	fs.StringVar(&cfg.Study, "study", "", "study `id`")
	fs.IntVar(&cfg.Respondents, "respondents", 10, "synthetic respondents in all")
	fs.IntVar(&cfg.Concurrency, "concurrency", 5, "respondents at once")
	fs.DurationVar(&cfg.ThinkTime, "think-time", 0, "pause before each reply")
	fs.DurationVar(&cfg.MaxTime, "max-time", simulate.DefaultMaxTime, "stop the run after this long")
	fs.Uint64Var(&cfg.Seed, "seed", 1, "seed of the persona and covariate draws")
	personas := fs.String("personas", "", "personas `file` (YAML; see testdata/personas)")
	studyFile := fs.String("study-file", "", "the study `file`: default personas from its covariates, and its endpoints for --persona-endpoint")
	endpoint := fs.String("persona-endpoint", "", "endpoint `name` in the study file of a model that plays the personas")
	report := fs.String("report", "", "write the report as JSON to this `file`")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	usage := func(format string, a ...any) int {
		fmt.Fprintf(stderr, "trialogue simulate: "+format+"\n", a...)
		return exitUsage
	}
	if fs.NArg() > 0 {
		return usage("unexpected argument %q", fs.Arg(0))
	}
	var def *arms.Study
	if *studyFile != "" {
		var err error
		if def, _, err = arms.ParseFile(*studyFile); err != nil {
			fmt.Fprintf(stderr, "trialogue simulate: %v\n", err)
			return exitUsage
		}
		if cfg.Study == "" {
			cfg.Study = def.ID
		}
	}
	switch {
	case *personas != "":
		ps, err := simulate.LoadPersonas(*personas, *endpoint == "")
		if err != nil {
			return usage("%v", err)
		}
		cfg.Personas = ps
	case def != nil:
		cfg.Personas = simulate.FromStudy(def)
	default:
		return usage("give --personas FILE, or --study-file FILE to draw respondents from the study's covariates")
	}
	if *endpoint != "" {
		if def == nil {
			return usage("--persona-endpoint names an endpoint of the study file: give --study-file too")
		}
		player, params, err := personaPlayer(def, *endpoint)
		if err != nil {
			return usage("%v", err)
		}
		cfg.Player, cfg.PlayerParams = player, params
	}
	cfg.SyntheticKey = os.Getenv("TRIALOGUE_SYNTHETIC_KEY")
	if cfg.SyntheticKey == "" {
		fmt.Fprintln(stderr, "trialogue simulate: TRIALOGUE_SYNTHETIC_KEY is not set: these sessions will count as real respondents")
	}
	rep, err := simulate.Run(ctx, cfg)
	if err != nil {
		return usage("%v", err)
	}
	if err := rep.WriteTable(stdout); err != nil {
		fmt.Fprintf(stderr, "trialogue simulate: %v\n", err)
		return exitFail
	}
	if *report != "" {
		f, err := os.Create(*report)
		if err == nil {
			err = errors.Join(rep.WriteJSON(f), f.Close())
		}
		if err != nil {
			fmt.Fprintf(stderr, "trialogue simulate: report: %v\n", err)
			return exitFail
		}
	}
	if rep.ErrorCount() > 0 || rep.Completed < rep.Respondents {
		return exitFail
	}
	return exitOK
}

// personaPlayer builds the responder of a study endpoint to play personas.
func personaPlayer(def *arms.Study, name string) (responder.Responder, responder.Params, error) {
	e, ok := def.Endpoints[name]
	if !ok {
		return nil, responder.Params{}, fmt.Errorf("the study file has no endpoint %q", name)
	}
	params := responder.Params{Model: e.Model, Temperature: e.Temperature, TopP: e.TopP, MaxTokens: e.MaxTokens, Seed: e.Seed}
	switch e.Kind {
	case arms.EndpointScripted:
		return responder.NewScripted(responder.ScriptedConfig{Model: e.Model}), params, nil
	case arms.EndpointOpenAI:
		key := ""
		if e.APIKeyEnv != "" {
			if key = os.Getenv(e.APIKeyEnv); key == "" {
				return nil, params, fmt.Errorf("endpoint %q needs its API key in %s, which is empty", name, e.APIKeyEnv)
			}
		}
		r, err := responder.NewOpenAI(responder.OpenAIConfig{BaseURL: e.BaseURL, APIKey: key,
			Timeout: time.Duration(e.Timeout), MaxAttempts: e.Attempts})
		return r, params, err
	}
	return nil, params, fmt.Errorf("endpoint %q has kind %q, which cannot play personas", name, e.Kind)
}
