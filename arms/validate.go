package arms

import (
	"fmt"
	"net/url"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"text/template"
	"text/template/parse"
	"time"

	"trialogue/arms/assign"
)

var (
	idPattern       = regexp.MustCompile(`^[a-z0-9][a-z0-9-]{0,62}$`)
	namePattern     = regexp.MustCompile(`^[a-z][a-z0-9_]{0,39}$`)
	armNamePattern  = regexp.MustCompile(`^[a-z0-9][a-z0-9_-]{0,39}$`)
	codePattern     = regexp.MustCompile(`^[A-Za-z0-9]{1,8}$`)
	languagePattern = regexp.MustCompile(`^[a-z]{2,3}(-[A-Z]{2})?$`)
)

// reservedNames cannot name a covariate: they mean something else in the
// entry link or in templates.
var reservedNames = []string{"rid", "vars", "lang", "code", "arm_code", "study"}

// Defaults applied to a parsed study.
const (
	DefaultMaxChars      = 1500
	DefaultTextMaxLen    = 200
	DefaultTimeout       = 60 * time.Second
	DefaultAttempts      = 4
	maxRepliesPerSession = 100
	// maxExactInt is the largest integer an IEEE-754 double holds exactly
	// (2^53 - 1). The canonical form (RFC 8785, section 3.2.2.3) writes
	// numbers as doubles, so a larger seed would be recorded rounded and two
	// different seeds would share a version hash.
	maxExactInt = 1<<53 - 1
)

func (v *validator) validate() {
	s := v.s
	if !idPattern.MatchString(s.ID) {
		v.at(p("id"), "id must be 1 to 63 lowercase letters, digits or hyphens, starting with a letter or digit (got %q)", s.ID)
	}
	if strings.TrimSpace(s.Title) == "" {
		v.at(p("title"), "title is missing")
	}
	if s.Language == "" {
		s.Language = "en"
	} else if !languagePattern.MatchString(s.Language) {
		v.at(p("language"), "language must be a language code such as en, es or pt-BR (got %q)", s.Language)
	}
	v.languages()
	v.covariates()
	v.strata()
	v.endpoints()
	v.fielding()
	v.arms()
	v.allocation()
	v.returnURL()
	v.probes()
	v.flagSettings()
	if len(v.probs.List) == 0 {
		v.trialRender()
	}
	for i, fa := range s.FrameAncestors {
		if fa != "*" && fa != "'self'" && !strings.HasPrefix(fa, "https://") && !strings.HasPrefix(fa, "http://") {
			v.at(p("frame_ancestors", strconv.Itoa(i)), "frame_ancestors entries are origins such as https://survey.example.org, or * (got %q)", fa)
		}
	}
	if s.ParentOrigin != "" && s.ParentOrigin != "*" {
		if u, err := url.Parse(s.ParentOrigin); err != nil || (u.Scheme != "https" && u.Scheme != "http") || u.Host == "" || u.Path != "" {
			v.at(p("parent_origin"), "parent_origin must be an origin such as https://survey.example.org (got %q)", s.ParentOrigin)
		}
	}
}

func (v *validator) covariates() {
	seen := map[string]bool{}
	for i, c := range v.s.Covariates {
		at := p("covariates", strconv.Itoa(i))
		switch {
		case !namePattern.MatchString(c.Name):
			v.at(append(at, "name"), "covariate name must start with a lowercase letter and use only lowercase letters, digits and _ (got %q)", c.Name)
		case slices.Contains(reservedNames, c.Name):
			v.at(append(at, "name"), "%q is reserved and cannot name a covariate", c.Name)
		case seen[c.Name]:
			v.at(append(at, "name"), "covariate %q is declared twice", c.Name)
		}
		seen[c.Name] = true
		switch c.Type {
		case TypeChoice:
			if len(c.Values) < 2 {
				v.at(append(at, "values"), "choice covariate %q needs at least two values", c.Name)
			}
			vals := map[string]bool{}
			for j, val := range c.Values {
				if val == "" || vals[val] {
					v.at(append(at, "values", strconv.Itoa(j)), "value %q of covariate %q is empty or repeated", val, c.Name)
				}
				vals[val] = true
			}
			if c.Min != nil || c.Max != nil {
				v.at(append(at, "min"), "min and max apply to integer covariates, not to choice covariate %q", c.Name)
			}
		case TypeInteger:
			if len(c.Values) > 0 {
				v.at(append(at, "values"), "values apply to choice covariates, not to integer covariate %q", c.Name)
			}
			for _, b := range []struct {
				key string
				n   *int
			}{{"min", c.Min}, {"max", c.Max}} {
				if b.n != nil && (*b.n < -maxExactInt || *b.n > maxExactInt) {
					v.at(append(at, b.key), "%s of covariate %q must be between -%d and %d", b.key, c.Name, maxExactInt, maxExactInt)
				}
			}
			if c.Min != nil && c.Max != nil && *c.Min > *c.Max {
				v.at(append(at, "min"), "covariate %q has min %d greater than max %d", c.Name, *c.Min, *c.Max)
			}
		case TypeText:
			if len(c.Values) > 0 || c.Min != nil || c.Max != nil {
				v.at(at, "text covariate %q takes no values, min or max (use max_len)", c.Name)
			}
			if c.MaxLen < 0 {
				v.at(append(at, "max_len"), "max_len of covariate %q must be positive", c.Name)
			}
			if c.MaxLen == 0 {
				v.s.Covariates[i].MaxLen = DefaultTextMaxLen
			}
		default:
			v.at(append(at, "type"), "covariate %q has type %q; use choice, integer or text", c.Name, c.Type)
		}
	}
}

func (v *validator) strata() {
	seen := map[string]bool{}
	for i, name := range v.s.Strata {
		at := p("strata", strconv.Itoa(i))
		c, ok := v.s.Covariate(name)
		switch {
		case !ok:
			v.at(at, "stratum %q is not a declared covariate", name)
		case c.Type != TypeChoice:
			v.at(at, "stratum %q must be a choice covariate (it is %s): strata need a fixed set of values", name, c.Type)
		case !c.Required:
			v.at(at, "stratum %q must be a required covariate, or respondents without it have no stratum", name)
		case seen[name]:
			v.at(at, "stratum %q is listed twice", name)
		}
		seen[name] = true
	}
}

func (v *validator) endpoints() {
	for name, e := range v.s.Endpoints {
		at := p("endpoints", name)
		if e == nil {
			v.at(at, "endpoint %q is empty", name)
			continue
		}
		if e.Timeout == 0 {
			e.Timeout = Duration(DefaultTimeout)
		}
		if e.Attempts == 0 {
			e.Attempts = DefaultAttempts
		}
		if e.Attempts < 1 || e.Attempts > 10 {
			v.at(append(at, "attempts"), "attempts must be between 1 and 10 (got %d)", e.Attempts)
		}
		// written as !(in range) so that .nan is refused too
		if e.Temperature != nil && !(*e.Temperature >= 0 && *e.Temperature <= 2) {
			v.at(append(at, "temperature"), "temperature must be between 0 and 2 (got %g)", *e.Temperature)
		}
		if e.TopP != nil && !(*e.TopP > 0 && *e.TopP <= 1) {
			v.at(append(at, "top_p"), "top_p must be above 0 and at most 1 (got %g)", *e.TopP)
		}
		if e.MaxTokens < 0 || e.MaxTokens > maxExactInt {
			v.at(append(at, "max_tokens"), "max_tokens must be between 0 and %d", maxExactInt)
		}
		if e.Seed != nil && (*e.Seed < -maxExactInt || *e.Seed > maxExactInt) {
			v.at(append(at, "seed"), "seed must be between -%d and %d, so that the version hash records it exactly", maxExactInt, maxExactInt)
		}
		switch e.Kind {
		case EndpointOpenAI:
			u, err := url.Parse(e.BaseURL)
			if e.BaseURL == "" || err != nil || (u.Scheme != "https" && u.Scheme != "http") || u.Host == "" {
				v.at(append(at, "base_url"), "endpoint %q needs base_url, an http(s) address ending in /v1", name)
			}
			if e.Model == "" {
				v.at(append(at, "model"), "endpoint %q needs a model name", name)
			}
			if e.APIKeyEnv != "" && !regexp.MustCompile(`^[A-Z_][A-Z0-9_]*$`).MatchString(e.APIKeyEnv) {
				v.at(append(at, "api_key_env"), "api_key_env names an environment variable (such as TRIALOGUE_MODEL_KEY), never the key itself")
			}
			if e.Chunks != 0 || e.Delay != 0 {
				v.at(at, "chunks and delay apply to scripted endpoints only")
			}
		case EndpointScripted:
			if e.BaseURL != "" || e.APIKeyEnv != "" {
				v.at(at, "a scripted endpoint answers offline: remove base_url and api_key_env")
			}
			if e.Chunks < 0 || e.Chunks > 10000 {
				v.at(append(at, "chunks"), "chunks must be between 1 and 10000")
			}
			if e.Model == "" {
				e.Model = "scripted"
			}
		default:
			v.at(append(at, "kind"), "endpoint %q has kind %q; use openai or scripted", name, e.Kind)
		}
	}
}

func (v *validator) arms() {
	s := v.s
	if len(s.Arms) == 0 {
		v.at(p("arms"), "the study declares no arms")
		return
	}
	codes := map[string]string{}
	for i, name := range s.ArmOrder {
		a := s.Arms[name]
		at := p("arms", name)
		if !armNamePattern.MatchString(name) {
			v.atKey(at, "arm name %q must use lowercase letters, digits, - and _", name)
		}
		if a == nil {
			v.at(at, "arm %q is empty", name)
			continue
		}
		if a.Code == "" {
			a.Code = "A" + strconv.Itoa(i+1)
		} else if !codePattern.MatchString(a.Code) {
			v.at(append(at, "code"), "arm code must be 1 to 8 letters or digits (got %q)", a.Code)
		}
		if other, dup := codes[a.Code]; dup {
			v.at(append(at, "code"), "arms %q and %q share the code %q", other, name, a.Code)
		}
		codes[a.Code] = name
		if a.MinSeconds < 0 || a.MinSeconds > 3600 {
			v.at(append(at, "min_seconds"), "min_seconds must be between 0 and 3600")
		}
		switch a.Kind {
		case KindFixed:
			if strings.TrimSpace(a.Text) == "" {
				v.at(append(at, "text"), "fixed arm %q needs a text", name)
			}
			if a.Endpoint != "" || a.System != "" || a.Prompt != "" || a.Replies != nil {
				v.at(at, "fixed arm %q shows a text only: remove endpoint, system, prompt and replies", name)
			}
		case KindMessage:
			v.modelArm(name, a, at)
			if strings.TrimSpace(a.Prompt) == "" {
				v.at(append(at, "prompt"), "message arm %q needs a prompt asking the model for its message", name)
			}
			if a.Replies != nil {
				v.at(append(at, "replies"), "message arm %q takes no replies; use kind chat for a conversation", name)
			}
		case KindChat:
			v.modelArm(name, a, at)
			if a.Opening && strings.TrimSpace(a.Prompt) == "" {
				v.at(append(at, "prompt"), "chat arm %q opens with a model message, so it needs a prompt asking for it", name)
			}
			if a.Replies == nil {
				v.at(append(at, "replies"), "chat arm %q needs replies: {min, max}", name)
				break
			}
			r := a.Replies
			if r.MaxChars == 0 {
				r.MaxChars = DefaultMaxChars
			}
			switch {
			case r.Max < 1 || r.Max > maxRepliesPerSession:
				v.at(append(at, "replies", "max"), "replies max must be between 1 and %d (got %d)", maxRepliesPerSession, r.Max)
			case r.Min < 0:
				v.at(append(at, "replies", "min"), "replies min must not be negative")
			case r.Min > r.Max:
				v.at(append(at, "replies", "min"), "replies min %d is greater than max %d", r.Min, r.Max)
			}
			if r.MinWords < 0 || r.MinWords > 200 {
				v.at(append(at, "replies", "min_words"), "min_words must be between 0 and 200")
			}
			if r.MaxChars < 1 || r.MaxChars > 20000 {
				v.at(append(at, "replies", "max_chars"), "max_chars must be between 1 and 20000")
			}
		default:
			v.at(append(at, "kind"), "arm %q has kind %q; use fixed, message or chat", name, a.Kind)
		}
	}
	// Every arm must have a place in the order, or it would go unchecked and
	// without a code; merge keys (<<) can hide arms from the file's key order.
	var hidden []string
	for name := range s.Arms {
		if !slices.Contains(s.ArmOrder, name) {
			hidden = append(hidden, name)
		}
	}
	slices.Sort(hidden)
	for _, name := range hidden {
		v.at(p("arms"), "arm %q must be written out under arms, not merged in with <<", name)
	}
}

// modelArm checks what message and chat arms share: an endpoint and prompts.
func (v *validator) modelArm(name string, a *Arm, at []string) {
	if a.Text != "" {
		v.at(append(at, "text"), "arm %q is written by the model: text applies to fixed arms only", name)
	}
	if a.Endpoint == "" {
		v.at(append(at, "endpoint"), "arm %q needs an endpoint", name)
	} else if _, ok := v.s.Endpoints[a.Endpoint]; !ok {
		v.at(append(at, "endpoint"), "arm %q uses endpoint %q, which is not declared under endpoints", name, a.Endpoint)
	}
	if strings.TrimSpace(a.System) == "" {
		v.at(append(at, "system"), "arm %q needs a system prompt", name)
	}
	for k, tmpl := range a.Vars {
		if !namePattern.MatchString(k) {
			v.atKey(append(at, "vars", k), "variable name %q must use lowercase letters, digits and _", k)
		}
		v.template(append(at, "vars", k), tmpl, nil)
	}
	v.template(append(at, "system"), a.System, a.Vars)
	v.template(append(at, "prompt"), a.Prompt, a.Vars)
}

// template checks that a prompt template parses and refers only to declared
// covariates and, through .vars, to the arm's own variables.
func (v *validator) template(at []string, text string, vars map[string]string) {
	if text == "" {
		return
	}
	t, err := template.New(strings.Join(at, ".")).Option("missingkey=error").Parse(text)
	if err != nil {
		v.at(at, "template does not parse: %s", strings.TrimPrefix(err.Error(), "template: "))
		return
	}
	for _, f := range fieldRefs(t.Tree.Root) {
		switch {
		case f[0] == "vars" && vars == nil:
			v.at(at, "template refers to .vars, but variables cannot refer to other variables")
		case f[0] == "vars" && len(f) < 2:
			v.at(at, "template uses .vars without naming a variable (write .vars.NAME)")
		case f[0] == "vars":
			if _, ok := vars[f[1]]; !ok {
				v.at(at, "template refers to .vars.%s, which the arm does not declare under vars", f[1])
			}
		default:
			if _, ok := v.s.Covariate(f[0]); !ok {
				v.at(at, "template refers to .%s, which is not a declared covariate", f[0])
			}
		}
	}
}

// fieldRefs lists the field chains (".a.b" as [a b]) a template refers to.
func fieldRefs(n parse.Node) [][]string {
	var out [][]string
	var walk func(parse.Node)
	walk = func(n parse.Node) {
		switch n := n.(type) {
		case nil:
		case *parse.ListNode:
			if n == nil {
				return
			}
			for _, c := range n.Nodes {
				walk(c)
			}
		case *parse.ActionNode:
			walk(n.Pipe)
		case *parse.PipeNode:
			if n == nil {
				return
			}
			for _, c := range n.Cmds {
				walk(c)
			}
		case *parse.CommandNode:
			for _, a := range n.Args {
				walk(a)
			}
		case *parse.FieldNode:
			out = append(out, n.Ident)
		case *parse.VariableNode:
			// $.name is the template's data, like .name at the top level
			if len(n.Ident) > 1 && n.Ident[0] == "$" {
				out = append(out, n.Ident[1:])
			}
		case *parse.ChainNode:
			walk(n.Node)
		case *parse.IfNode:
			walk(n.Pipe)
			walk(n.List)
			walk(n.ElseList)
		case *parse.RangeNode:
			walk(n.Pipe)
			walk(n.List)
			walk(n.ElseList)
		case *parse.WithNode:
			walk(n.Pipe)
			walk(n.List)
			walk(n.ElseList)
		}
	}
	walk(n)
	return out
}

// probes checks the drift probes: known model arms, valid covariates,
// replies for chats.
func (v *validator) probes() {
	s := v.s
	seen := map[string]bool{}
	for i, pr := range s.Probes {
		at := p("probes", strconv.Itoa(i))
		if !armNamePattern.MatchString(pr.Name) || seen[pr.Name] {
			v.at(append(at, "name"), "probe name %q must be unique and use lowercase letters, digits, - and _", pr.Name)
		}
		seen[pr.Name] = true
		for j, a := range pr.Arms {
			arm, ok := s.Arms[a]
			switch {
			case !ok:
				v.at(append(at, "arms", strconv.Itoa(j)), "probe %q names arm %q, which is not declared under arms", pr.Name, a)
			case !arm.NeedsModel():
				v.at(append(at, "arms", strconv.Itoa(j)), "probe %q names arm %q, a fixed text: probes play model-written arms", pr.Name, a)
			}
		}
		for _, c := range s.Covariates {
			val, given := pr.Covariates[c.Name]
			if !given {
				if c.Required {
					v.at(append(at, "covariates"), "probe %q needs a value for the required covariate %q", pr.Name, c.Name)
				}
				continue
			}
			if _, err := c.Check(string(val)); err != nil {
				v.at(append(at, "covariates", c.Name), "probe %q, covariate %q: %s", pr.Name, c.Name, err.Error())
			}
		}
		for name := range pr.Covariates {
			if _, ok := s.Covariate(name); !ok {
				v.at(append(at, "covariates", name), "probe %q sets %q, which is not a declared covariate", pr.Name, name)
			}
		}
		for _, a := range s.ProbeArms(pr) {
			if arm := s.Arms[a]; arm != nil && arm.Kind == KindChat && len(pr.Replies) == 0 && !arm.Opening {
				v.at(at, "probe %q plays chat arm %q but gives no replies", pr.Name, a)
			}
		}
	}
	if d := s.Drift; d != nil {
		if d.Runs < 0 || d.Runs > 100 {
			v.at(p("drift", "runs"), "drift runs must be between 1 and 100")
		}
		for _, x := range []struct {
			name string
			v    *float64
		}{{"exact_warn", d.ExactWarn}, {"exact_fail", d.ExactFail}, {"similarity_warn", d.SimilarityWarn}, {"similarity_fail", d.SimilarityFail}, {"ks_warn", d.KSWarn}, {"ks_fail", d.KSFail}} {
			if x.v != nil && !(*x.v >= 0 && *x.v <= 1) {
				v.at(p("drift", x.name), "drift %s must be between 0 and 1", x.name)
			}
		}
	}
}

// ProbeArms lists the arms a probe plays, in declaration order.
func (s *Study) ProbeArms(pr Probe) []string {
	var out []string
	for _, name := range s.ArmOrder {
		a := s.Arms[name]
		if a == nil || !a.NeedsModel() {
			continue
		}
		if len(pr.Arms) == 0 || slices.Contains(pr.Arms, name) {
			out = append(out, name)
		}
	}
	return out
}

// trialRender renders every model arm's prompts for a range of made-up
// respondents (each value of each choice covariate, and one without any
// optional covariate), so that a template that fails at run time, such as a
// comparison with a covariate a respondent may leave out, fails the check
// instead of a respondent's turn.
func (v *validator) trialRender() {
	s := v.s
	base := s.Example()
	type trial struct {
		what string
		r    Respondent
	}
	trials := []trial{{"the example covariates", base}}
	without := Respondent{RID: base.RID, Covariates: map[string]string{}}
	for _, c := range s.Covariates {
		if c.Required {
			without.Covariates[c.Name] = base.Covariates[c.Name]
		}
		if c.Type != TypeChoice {
			continue
		}
		for _, val := range c.Values[1:] {
			r := Respondent{RID: base.RID, Covariates: map[string]string{}}
			for k, x := range base.Covariates {
				r.Covariates[k] = x
			}
			r.Covariates[c.Name] = val
			trials = append(trials, trial{c.Name + "=" + val, r})
		}
	}
	if len(without.Covariates) < len(base.Covariates) {
		trials = append(trials, trial{"no optional covariates", without})
	}
	for _, name := range s.ArmOrder {
		if !s.Arms[name].NeedsModel() {
			continue
		}
		for _, tr := range trials {
			if _, err := s.Render(name, tr.r); err != nil {
				v.at(p("arms", name), "the prompts of arm %q fail for a respondent with %s (guard optional covariates with {{if .name}}): %s",
					name, tr.what, strings.TrimPrefix(err.Error(), "render "))
				break
			}
		}
	}
}

func (v *validator) allocation() {
	s := v.s
	for _, name := range v.keyOrder("allocation", "arms") {
		if _, ok := s.Arms[name]; !ok {
			v.atKey(p("allocation", "arms", name), "allocation names arm %q, which is not declared under arms", name)
		}
	}
	for _, name := range s.ArmOrder {
		if _, ok := s.Allocation.Arms[name]; !ok {
			v.atKey(p("arms", name), "arm %q has no ratio under allocation.arms", name)
		}
	}
	if len(s.Allocation.Blocks) == 0 {
		v.at(p("allocation", "blocks"), "allocation needs block sizes, e.g. blocks: [6, 12]")
		return
	}
	sc := s.Scheme()
	sum := 0
	for _, r := range sc.Arms {
		sum += max(r.Weight, 0)
	}
	for i, b := range s.Allocation.Blocks {
		if sum > 0 && (b < 1 || b%sum != 0) {
			v.at(p("allocation", "blocks", strconv.Itoa(i)), "block size %d is not a positive multiple of %d, the sum of the ratios under allocation.arms", b, sum)
			return
		}
	}
	if err := sc.Validate(); err != nil {
		v.at(p("allocation", "arms"), "%s", err.Error())
	}
}

// Scheme returns the study's allocation scheme, arms in declaration order.
func (s *Study) Scheme() assign.Scheme {
	sc := assign.Scheme{Blocks: s.Allocation.Blocks}
	for _, name := range s.ArmOrder {
		if w, ok := s.Allocation.Arms[name]; ok {
			sc.Arms = append(sc.Arms, assign.Ratio{Arm: name, Weight: w})
		}
	}
	return sc
}

// returnFields are what a return URL template may use.
var returnFields = []string{"rid", "code", "arm_code", "study"}

func (v *validator) returnURL() {
	s := v.s
	if s.Return == "" {
		v.at(p("return"), "return is missing: the survey address that respondents go back to, e.g. https://survey.example.org/resume?rid={{.rid}}&code={{.code}}")
		return
	}
	t, err := template.New("return").Option("missingkey=error").Parse(s.Return)
	if err != nil {
		v.at(p("return"), "return template does not parse: %s", strings.TrimPrefix(err.Error(), "template: "))
		return
	}
	uses := map[string]bool{}
	unknown := false
	for _, f := range fieldRefs(t.Tree.Root) {
		if !slices.Contains(returnFields, f[0]) {
			v.at(p("return"), "return may use {{.rid}}, {{.code}}, {{.arm_code}} and {{.study}}; .%s is not one of them", f[0])
			unknown = true
		}
		uses[f[0]] = true
	}
	if !uses["code"] {
		v.at(p("return"), "return must pass the completion code back to the survey with {{.code}}")
	}
	if unknown {
		return // rendering the example would only repeat the problem
	}
	u, err := s.ReturnURL("R-example", "ABCDE-FGHJK", "A1")
	if err != nil {
		v.at(p("return"), "%s", err.Error())
		return
	}
	pu, err := url.Parse(u)
	if err != nil || (pu.Scheme != "https" && pu.Scheme != "http") || pu.Host == "" {
		v.at(p("return"), "return must be an absolute http(s) address (got %q for an example respondent)", u)
	}
}

// ReturnURL renders the return address for one respondent; values are
// escaped for use in a URL query.
func (s *Study) ReturnURL(rid, code, armCode string) (string, error) {
	t, err := template.New("return").Option("missingkey=error").Parse(s.Return)
	if err != nil {
		return "", fmt.Errorf("return template: %w", err)
	}
	var b strings.Builder
	data := map[string]string{
		"rid":      url.QueryEscape(rid),
		"code":     url.QueryEscape(code),
		"arm_code": url.QueryEscape(armCode),
		"study":    url.QueryEscape(s.ID),
	}
	if err := t.Execute(&b, data); err != nil {
		return "", fmt.Errorf("return template: %w", err)
	}
	return b.String(), nil
}

// languages checks the further languages and the per-language translations.
func (v *validator) languages() {
	s := v.s
	seen := map[string]bool{s.Language: true}
	for i, l := range s.Languages {
		switch {
		case !languagePattern.MatchString(l):
			v.at(p("languages", strconv.Itoa(i)), "languages entries must be language codes such as en, es or pt-BR (got %q)", l)
		case seen[l]:
			v.at(p("languages", strconv.Itoa(i)), "language %q is listed twice (the study's language counts)", l)
		}
		seen[l] = true
	}
	for l := range s.Translations {
		if !seen[l] {
			v.at(p("translations", l), "translations for %q, which is neither the study's language nor one of its languages", l)
		}
	}
}

// Respondent returns the probe's made-up respondent.
func (pr Probe) Respondent(s *Study) Respondent {
	r := Respondent{RID: "probe-" + pr.Name, Covariates: map[string]string{}}
	for _, c := range s.Covariates {
		if v, ok := pr.Covariates[c.Name]; ok {
			if norm, err := c.Check(string(v)); err == nil {
				r.Covariates[c.Name] = norm
			}
		}
	}
	return r
}

// flagSettings checks the flags block: known arms and covariates, phrases
// that can match, thresholds in range.
func (v *validator) flagSettings() {
	f := v.s.Flags
	if f == nil {
		return
	}
	seen := map[string]bool{}
	for i, ph := range f.Concede {
		at := p("flags", "concede", strconv.Itoa(i))
		n := strings.ToLower(strings.Join(strings.Fields(ph), " "))
		switch {
		case CountWords(ph) == 0:
			v.at(at, "concede phrase %q has no words", ph)
		case len(ph) > 200:
			v.at(at, "concede phrases are at most 200 characters")
		case seen[n]:
			v.at(at, "concede phrase %q is listed twice", ph)
		}
		seen[n] = true
	}
	if len(f.Concede) > 200 {
		v.at(p("flags", "concede"), "at most 200 concede phrases (got %d)", len(f.Concede))
	}
	for i, name := range f.Argue {
		a, ok := v.s.Arms[name]
		switch {
		case !ok:
			v.at(p("flags", "argue", strconv.Itoa(i)), "flags.argue names arm %q, which is not declared under arms", name)
		case a != nil && !a.NeedsModel():
			v.at(p("flags", "argue", strconv.Itoa(i)), "flags.argue names arm %q, a fixed text: only model-written arms argue", name)
		}
	}
	for i, name := range f.Reveal {
		if _, ok := v.s.Covariate(name); !ok {
			v.at(p("flags", "reveal", strconv.Itoa(i)), "flags.reveal names %q, which is not a declared covariate", name)
		}
	}
	if f.ShortWords < 0 || f.ShortWords > 50 {
		v.at(p("flags", "short_words"), "short_words must be between 1 and 50 (got %d)", f.ShortWords)
	}
	if f.TimeLimit != 0 && (time.Duration(f.TimeLimit) < time.Minute || time.Duration(f.TimeLimit) > 7*24*time.Hour) {
		v.at(p("flags", "time_limit"), "time_limit must be between 1m and 168h (got %s)", time.Duration(f.TimeLimit))
	}
}
