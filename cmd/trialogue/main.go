// Command trialogue serves the conversational arms of survey experiments:
// it assigns arms, relays capped chats to a model, logs every turn and sends
// respondents back to the survey with a completion code.
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

// Exit statuses.
const (
	exitOK    = 0
	exitFail  = 1 // the command ran and failed (a server error, a code that does not verify)
	exitUsage = 2 // bad flags, or a study file with errors
)

func usage() string {
	return `trialogue: conversational treatment arms for survey experiments

Commands:
  trialogue demo  [--addr 127.0.0.1:8080] [--db trialogue-demo.db] [--study testdata/demo-study.yaml]
  trialogue serve --study FILE [--study FILE ...] [--db trialogue.db] [--addr 127.0.0.1:8080]
  trialogue check FILE
  trialogue code verify --db PATH --study ID RID CODE
  trialogue verify (--db PATH --study ID | BUNDLE.tar.gz)
  trialogue bundle --db PATH --study ID --out FILE.tar.gz [--release]
  trialogue close --db PATH --study ID
  trialogue user add EMAIL --role owner|viewer --db PATH [--password-stdin]   (also: user reset EMAIL, user list)
  trialogue drift --db PATH --study ID [--runs N]
  trialogue effects --db PATH --study ID --outcomes FILE.csv --id COLUMN --outcome COLUMN --control ARM[,ARM] [--adjust none|pre|lin] [--out DIR]
  trialogue arms-map --db PATH --study ID [--permutations N] [--out DIR]
  trialogue simulate --url URL --study ID --respondents N --concurrency C [--personas FILE] [--persona-endpoint NAME --study-file FILE] [--think-time D] [--report FILE]
  trialogue backup --db PATH --out FILE
  trialogue export --db PATH --study ID --out DIR [--include-pilot] [--include-synthetic] [--release]

Run "trialogue COMMAND -h" for a command's flags.
`
}

func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage())
		return exitUsage
	}
	switch args[0] {
	case "demo":
		return runServe(ctx, args[1:], stdout, stderr, true)
	case "serve":
		return runServe(ctx, args[1:], stdout, stderr, false)
	case "check":
		return runCheck(args[1:], stdout, stderr)
	case "code":
		return runCode(ctx, args[1:], stdout, stderr)
	case "verify":
		return runVerify(ctx, args[1:], stdout, stderr)
	case "bundle":
		return runBundle(ctx, args[1:], stdout, stderr)
	case "close":
		return runClose(ctx, args[1:], stdout, stderr)
	case "user":
		return runUser(ctx, args[1:], os.Stdin, stdout, stderr)
	case "drift":
		return runDrift(ctx, args[1:], stdout, stderr)
	case "effects":
		return runEffects(ctx, args[1:], stdout, stderr)
	case "arms-map":
		return runArmsMap(ctx, args[1:], stdout, stderr)
	case "simulate":
		return runSimulate(ctx, args[1:], stdout, stderr)
	case "backup":
		return runBackup(ctx, args[1:], stdout, stderr)
	case "export":
		return runExport(ctx, args[1:], stdout, stderr)
	case "help", "-h", "--help":
		fmt.Fprint(stdout, usage())
		return exitOK
	}
	fmt.Fprintf(stderr, "trialogue: unknown command %q\n\n%s", args[0], usage())
	return exitUsage
}
