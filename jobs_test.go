package main

// Tests of the cluster manifests in jobs/. A manifest that kubectl or Argo
// would reject, or a command line that hindcast would reject, fails only on
// the cluster, at night; these tests move that failure here. The Kubernetes
// kinds are parsed strictly into the Kubernetes API types (k8s.io/api), the
// Argo CronWorkflow strictly into Argo's own types (argo-workflows v3), every container's command
// line goes through hindcast's own parser with its placeholders filled in,
// and the command lines are run, in the DAG's order, on a small local fleet.

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"

	batchv1 "k8s.io/api/batch/v1"
	corev1 "k8s.io/api/core/v1"
	rbacv1 "k8s.io/api/rbac/v1"
	"k8s.io/apimachinery/pkg/api/resource"
	k8syaml "sigs.k8s.io/yaml"

	wfv1 "github.com/argoproj/argo-workflows/v3/pkg/apis/workflow/v1alpha1"

	"hindcast/pipeline"
)

// The values the manifests must carry, as the task that asked for them set
// them (not read back from the manifests).
const (
	jobsImage       = "registry.larkspur.example/hindcast:0.1.0"
	jobsMountPath   = "/etc/hindcast"
	jobsConfigName  = "aisle-pickers-cluster.yaml"
	jobsConfigPath  = jobsMountPath + "/" + jobsConfigName
	jobsConfigMap   = "hindcast-config"
	jobsSecret      = "hindcast-s3"
	jobsAccount     = "hindcast"
	jobsWorkers     = 4
	jobsTestVersion = "20261201T023000Z"
)

// jobsStageChain is the DAG's task chain, each depending on the one before.
func jobsStageChain() []string { return []string{"ingest", "episodes", "goals", "pack", "commit"} }

// jobsDoc is one YAML document of a file in jobs/.
type jobsDoc struct {
	where      string // file and document number, for messages
	raw        []byte
	apiVersion string
	kind       string
	name       string
	generic    map[string]any
}

// jobsDocs reads every document of jobs/*.yaml. Documents are separated by
// a line holding only "---" (YAML 1.2 §9.2, the document marker).
func jobsDocs(t *testing.T) []jobsDoc {
	t.Helper()
	files, err := filepath.Glob("jobs/*.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if len(files) == 0 {
		t.Fatal("no jobs/*.yaml")
	}
	var docs []jobsDoc
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		for i, part := range strings.Split(string(data), "\n---\n") {
			d := jobsDoc{where: fmt.Sprintf("%s document %d", f, i+1), raw: []byte(part)}
			if err := k8syaml.Unmarshal(d.raw, &d.generic); err != nil {
				t.Fatalf("%s: %v", d.where, err)
			}
			if d.generic == nil {
				t.Fatalf("%s is empty", d.where)
			}
			d.apiVersion, _ = d.generic["apiVersion"].(string)
			d.kind, _ = d.generic["kind"].(string)
			if meta, ok := d.generic["metadata"].(map[string]any); ok {
				d.name, _ = meta["name"].(string)
			}
			docs = append(docs, d)
		}
	}
	return docs
}

// jobsStrict parses a document strictly: an unknown field or a duplicate key
// is an error, as `kubectl apply --validate=strict` makes it.
func jobsStrict(t *testing.T, d jobsDoc, into any) {
	t.Helper()
	if err := k8syaml.UnmarshalStrict(d.raw, into); err != nil {
		t.Fatalf("%s (%s %s) does not parse strictly as %T: %v", d.where, d.apiVersion, d.kind, into, err)
	}
}

// jobsStrictValue parses a generic value (part of the CronWorkflow that is a
// Kubernetes type, like a container) strictly into a Kubernetes API type.
func jobsStrictValue(t *testing.T, where string, v any, into any) {
	t.Helper()
	raw, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	if err := k8syaml.UnmarshalStrict(raw, into); err != nil {
		t.Fatalf("%s does not parse strictly as %T: %v", where, into, err)
	}
}

// jobsFind returns the one document of the kind and name.
func jobsFind(t *testing.T, docs []jobsDoc, kind, name string) jobsDoc {
	t.Helper()
	var found []jobsDoc
	for _, d := range docs {
		if d.kind == kind && d.name == name {
			found = append(found, d)
		}
	}
	if len(found) != 1 {
		t.Fatalf("want one %s %q in jobs/, found %d", kind, name, len(found))
	}
	return found[0]
}

func TestJobsManifestsParseStrictly(t *testing.T) {
	docs := jobsDocs(t)
	var got []string
	for _, d := range docs {
		got = append(got, d.kind+"/"+d.name)
		var meta struct {
			APIVersion, Kind, Name string
		}
		switch d.apiVersion + " " + d.kind {
		case "v1 ConfigMap":
			var o corev1.ConfigMap
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "v1 Secret":
			var o corev1.Secret
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "v1 ServiceAccount":
			var o corev1.ServiceAccount
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "batch/v1 Job":
			var o batchv1.Job
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "rbac.authorization.k8s.io/v1 Role":
			var o rbacv1.Role
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "rbac.authorization.k8s.io/v1 RoleBinding":
			var o rbacv1.RoleBinding
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
		case "argoproj.io/v1alpha1 CronWorkflow":
			// Argo's own Go types (argo-workflows v3.7.3); the DAG and
			// command lines are checked by TestJobsNightlyWorkflow.
			var o wfv1.CronWorkflow
			jobsStrict(t, d, &o)
			meta.APIVersion, meta.Kind, meta.Name = o.APIVersion, o.Kind, o.Name
			if len(o.Spec.WorkflowSpec.Templates) == 0 {
				t.Errorf("%s: CronWorkflow %s has no templates", d.where, o.Name)
			}
		default:
			t.Errorf("%s: %s %s is not a kind these tests know; add a strict check for it", d.where, d.apiVersion, d.kind)
			continue
		}
		if meta.Name == "" {
			t.Errorf("%s: %s without metadata.name", d.where, d.kind)
		}
	}
	sort.Strings(got)
	want := []string{
		"ConfigMap/" + jobsConfigMap,
		"CronWorkflow/hindcast-nightly",
		"Job/hindcast-rerun-stage",
		"Role/hindcast-executor",
		"RoleBinding/hindcast-executor",
		"Secret/" + jobsSecret,
		"ServiceAccount/" + jobsAccount,
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("jobs/ holds %v, want %v", got, want)
	}
}

// TestJobsCronWorkflowStrictRejects: Argo's types with the strict parse
// reject a misspelt field of the CronWorkflow spec.
func TestJobsCronWorkflowStrictRejects(t *testing.T) {
	d := jobsFind(t, jobsDocs(t), "CronWorkflow", "hindcast-nightly")
	var ok wfv1.CronWorkflow
	if err := k8syaml.UnmarshalStrict(d.raw, &ok); err != nil {
		t.Fatalf("CronWorkflow: %v", err)
	}
	old := []byte("\nspec:\n")
	if !bytes.Contains(d.raw, old) {
		t.Fatalf("the CronWorkflow has no %q", old)
	}
	bad := bytes.Replace(d.raw, old, []byte("\nspec:\n  concurrencyPolicyz: Forbid\n"), 1)
	var o wfv1.CronWorkflow
	if err := k8syaml.UnmarshalStrict(bad, &o); err == nil {
		t.Errorf("UnmarshalStrict accepted the CronWorkflow with a misspelt spec field")
	}
}

// TestJobsStrictParsingRejects shows that the strict parse above has teeth:
// a misspelt field and a duplicate key in the Job are errors.
func TestJobsStrictParsingRejects(t *testing.T) {
	d := jobsFind(t, jobsDocs(t), "Job", "hindcast-rerun-stage")
	for _, c := range []struct{ old, new string }{
		{"  completionMode: Indexed\n", "  completionMode: Indexed\n  completionz: 4\n"},
		{"  completionMode: Indexed\n", "  completionMode: Indexed\n  completionMode: NonIndexed\n"},
	} {
		if !bytes.Contains(d.raw, []byte(c.old)) {
			t.Fatalf("the Job has no %q", c.old)
		}
		bad := bytes.Replace(d.raw, []byte(c.old), []byte(c.new), 1)
		var j batchv1.Job
		if err := k8syaml.UnmarshalStrict(bad, &j); err == nil {
			t.Errorf("UnmarshalStrict accepted the Job with %q", c.new)
		}
	}
}

func TestJobsConfigMapIsTheClusterConfig(t *testing.T) {
	docs := jobsDocs(t)
	var cm corev1.ConfigMap
	jobsStrict(t, jobsFind(t, docs, "ConfigMap", jobsConfigMap), &cm)
	want, err := os.ReadFile(filepath.Join("configs", jobsConfigName))
	if err != nil {
		t.Fatal(err)
	}
	if len(cm.Data) != 1 || len(cm.BinaryData) != 0 {
		t.Errorf("ConfigMap %s has keys %v and binary keys %v, want only %s", jobsConfigMap, slices.Sorted(maps.Keys(cm.Data)), slices.Sorted(maps.Keys(cm.BinaryData)), jobsConfigName)
	}
	if got := cm.Data[jobsConfigName]; got != string(want) {
		t.Errorf("ConfigMap data %s differs from configs/%s (first difference at byte %d); paste the file again",
			jobsConfigName, jobsConfigName, firstDiff(got, string(want)))
	}
}

// firstDiff is the index of the first byte where a and b differ.
func firstDiff(a, b string) int {
	for i := 0; i < len(a) && i < len(b); i++ {
		if a[i] != b[i] {
			return i
		}
	}
	return min(len(a), len(b))
}

// TestJobsClusterConfigMatchesLocal: the cluster config is the local one
// with the work area moved to S3, so both give the same config_sha256
// (which leaves out storage locations, SPEC §5) and the same datasets.
func TestJobsClusterConfigMatchesLocal(t *testing.T) {
	local, err := pipeline.LoadConfig("configs/aisle-pickers.yaml")
	if err != nil {
		t.Fatal(err)
	}
	cluster, err := pipeline.LoadConfig(filepath.Join("configs", jobsConfigName))
	if err != nil {
		t.Fatal(err)
	}
	for _, loc := range []struct{ what, got, want string }{
		{"source.uri", cluster.Source.URI, "s3://larkspur-fleet-raw/nightly/"},
		{"work", cluster.Work, "s3://larkspur-hindcast-work/aisle-pickers/"},
		{"output", cluster.Output, "s3://larkspur-datasets/"},
	} {
		if loc.got != loc.want {
			t.Errorf("cluster %s = %q, want %q", loc.what, loc.got, loc.want)
		}
	}
	if local.SHA256() != cluster.SHA256() {
		t.Errorf("config_sha256: local %s, cluster %s; the files differ in more than the work area", local.SHA256(), cluster.SHA256())
	}
	moved := *cluster
	moved.Work, moved.Dir, moved.Path = local.Work, local.Dir, local.Path
	if !reflect.DeepEqual(&moved, local) {
		t.Errorf("cluster config, work area aside:\n%s\nlocal:\n%s", moved.CanonicalJSON(), local.CanonicalJSON())
	}
}

func TestJobsSecretAndServiceAccount(t *testing.T) {
	docs := jobsDocs(t)
	var s corev1.Secret
	jobsStrict(t, jobsFind(t, docs, "Secret", jobsSecret), &s)
	// Placeholders only: real keys are created with kubectl, never committed.
	wantData := map[string]string{"AWS_ACCESS_KEY_ID": "REPLACE_ME", "AWS_SECRET_ACCESS_KEY": "REPLACE_ME"}
	if !reflect.DeepEqual(s.StringData, wantData) || len(s.Data) != 0 {
		t.Errorf("Secret stringData %v, data %v; want stringData %v only", s.StringData, s.Data, wantData)
	}
	if s.Type != corev1.SecretTypeOpaque {
		t.Errorf("Secret type %q, want Opaque", s.Type)
	}

	var sa corev1.ServiceAccount
	jobsStrict(t, jobsFind(t, docs, "ServiceAccount", jobsAccount), &sa)
	// IAM role ARN form: arn:aws:iam::<12-digit account>:role/<name> (AWS
	// IAM identifiers reference); the annotation key is EKS's IAM roles for
	// service accounts (from memory).
	arn := sa.Annotations["eks.amazonaws.com/role-arn"]
	if !regexp.MustCompile(`^arn:aws:iam::[0-9]{12}:role/[A-Za-z0-9+=,.@_/-]+$`).MatchString(arn) {
		t.Errorf("ServiceAccount role-arn annotation %q is not an IAM role ARN", arn)
	}

	var role rbacv1.Role
	jobsStrict(t, jobsFind(t, docs, "Role", "hindcast-executor"), &role)
	wantRules := []rbacv1.PolicyRule{{APIGroups: []string{"argoproj.io"}, Resources: []string{"workflowtaskresults"}, Verbs: []string{"create", "patch"}}}
	if !reflect.DeepEqual(role.Rules, wantRules) {
		t.Errorf("Role rules %+v, want %+v", role.Rules, wantRules)
	}
	var rb rbacv1.RoleBinding
	jobsStrict(t, jobsFind(t, docs, "RoleBinding", "hindcast-executor"), &rb)
	if want := (rbacv1.RoleRef{APIGroup: "rbac.authorization.k8s.io", Kind: "Role", Name: role.Name}); rb.RoleRef != want {
		t.Errorf("RoleBinding roleRef %+v, want %+v", rb.RoleRef, want)
	}
	if want := []rbacv1.Subject{{Kind: "ServiceAccount", Name: jobsAccount}}; !reflect.DeepEqual(rb.Subjects, want) {
		t.Errorf("RoleBinding subjects %+v, want %+v", rb.Subjects, want)
	}
}

// ---------------------------------------------------------------------------
// The Argo CronWorkflow, read generically

func jobsObj(t *testing.T, where string, v any) map[string]any {
	t.Helper()
	m, ok := v.(map[string]any)
	if !ok {
		t.Fatalf("%s: want a mapping, got %T %v", where, v, v)
	}
	return m
}

func jobsList(t *testing.T, where string, v any) []any {
	t.Helper()
	l, ok := v.([]any)
	if !ok {
		t.Fatalf("%s: want a list, got %T %v", where, v, v)
	}
	return l
}

func jobsStr(t *testing.T, where string, v any) string {
	t.Helper()
	s, ok := v.(string)
	if !ok {
		t.Fatalf("%s: want a string, got %T %v", where, v, v)
	}
	return s
}

// jobsKeys fails on a key outside allowed. Argo Workflows installs its CRDs
// without full schemas by default (from memory), so the API server keeps a
// misspelt field and the controller ignores it; catch it here instead. The
// allowed keys are field names of Argo Workflows' "Field Reference" (from
// memory), limited to those the manifest uses or is likely to.
func jobsKeys(t *testing.T, where string, m map[string]any, allowed ...string) {
	t.Helper()
	for k := range m {
		if !slices.Contains(allowed, k) {
			t.Errorf("%s: unknown key %q (allowed: %s)", where, k, strings.Join(allowed, ", "))
		}
	}
}

// jobsParams reads a list of Argo parameters {name, value} in order.
func jobsParams(t *testing.T, where string, v any) ([]string, map[string]string) {
	t.Helper()
	var names []string
	vals := map[string]string{}
	for i, p := range jobsList(t, where, v) {
		pm := jobsObj(t, fmt.Sprintf("%s[%d]", where, i), p)
		jobsKeys(t, fmt.Sprintf("%s[%d]", where, i), pm, "name", "value", "default", "description", "enum")
		name := jobsStr(t, where+" name", pm["name"])
		names = append(names, name)
		if val, ok := pm["value"]; ok {
			vals[name] = jobsStr(t, where+" "+name, val)
		}
	}
	return names, vals
}

// jobsWorkflow is the nightly CronWorkflow's parts that the tests use.
type jobsWorkflow struct {
	spec      map[string]any // the CronWorkflow's spec
	wfSpec    map[string]any // spec.workflowSpec
	params    map[string]string
	templates map[string]map[string]any
	tasks     []map[string]any // the entrypoint DAG's tasks, in order
}

func jobsNightly(t *testing.T) jobsWorkflow {
	t.Helper()
	d := jobsFind(t, jobsDocs(t), "CronWorkflow", "hindcast-nightly")
	if d.apiVersion != "argoproj.io/v1alpha1" {
		t.Fatalf("CronWorkflow apiVersion %q, want argoproj.io/v1alpha1", d.apiVersion)
	}
	jobsKeys(t, d.where, d.generic, "apiVersion", "kind", "metadata", "spec")
	var w jobsWorkflow
	w.spec = jobsObj(t, "spec", d.generic["spec"])
	jobsKeys(t, "spec", w.spec, "schedule", "schedules", "timezone", "concurrencyPolicy", "startingDeadlineSeconds",
		"successfulJobsHistoryLimit", "failedJobsHistoryLimit", "suspend", "workflowSpec", "workflowMetadata")
	w.wfSpec = jobsObj(t, "spec.workflowSpec", w.spec["workflowSpec"])
	jobsKeys(t, "spec.workflowSpec", w.wfSpec, "entrypoint", "arguments", "serviceAccountName", "activeDeadlineSeconds",
		"ttlStrategy", "securityContext", "volumes", "templates", "podGC", "parallelism", "nodeSelector", "tolerations")
	args := jobsObj(t, "workflowSpec.arguments", w.wfSpec["arguments"])
	jobsKeys(t, "workflowSpec.arguments", args, "parameters")
	_, w.params = jobsParams(t, "workflowSpec.arguments.parameters", args["parameters"])
	w.templates = map[string]map[string]any{}
	for i, tv := range jobsList(t, "workflowSpec.templates", w.wfSpec["templates"]) {
		where := fmt.Sprintf("workflowSpec.templates[%d]", i)
		tm := jobsObj(t, where, tv)
		jobsKeys(t, where, tm, "name", "inputs", "outputs", "container", "dag", "retryStrategy", "metadata", "activeDeadlineSeconds", "timeout")
		name := jobsStr(t, where+".name", tm["name"])
		if _, dup := w.templates[name]; dup {
			t.Fatalf("template %q defined twice", name)
		}
		w.templates[name] = tm
	}
	entry := jobsStr(t, "workflowSpec.entrypoint", w.wfSpec["entrypoint"])
	dag := jobsObj(t, "template "+entry+" dag", w.templates[entry]["dag"])
	jobsKeys(t, "dag", dag, "tasks", "failFast", "target")
	for i, tv := range jobsList(t, "dag.tasks", dag["tasks"]) {
		where := fmt.Sprintf("dag.tasks[%d]", i)
		tm := jobsObj(t, where, tv)
		jobsKeys(t, where, tm, "name", "template", "arguments", "dependencies", "depends", "withSequence", "withItems", "withParam", "when", "continueOn")
		w.tasks = append(w.tasks, tm)
	}
	return w
}

func TestJobsNightlyWorkflow(t *testing.T) {
	w := jobsNightly(t)
	// The schedule: nightly at 02:30 UTC, one run at a time.
	if got := w.spec["schedules"]; !reflect.DeepEqual(got, []any{"30 2 * * *"}) {
		t.Errorf("schedules = %v, want [30 2 * * *]", got)
	}
	if w.spec["timezone"] != "UTC" || w.spec["concurrencyPolicy"] != "Forbid" {
		t.Errorf("timezone %v, concurrencyPolicy %v; want UTC, Forbid", w.spec["timezone"], w.spec["concurrencyPolicy"])
	}
	if want := map[string]string{"workers": strconv.Itoa(jobsWorkers), "version": ""}; !reflect.DeepEqual(w.params, want) {
		t.Errorf("workflow parameters %v, want %v", w.params, want)
	}
	if w.wfSpec["serviceAccountName"] != jobsAccount {
		t.Errorf("serviceAccountName %v, want %s", w.wfSpec["serviceAccountName"], jobsAccount)
	}
	var psc corev1.PodSecurityContext
	jobsStrictValue(t, "workflowSpec.securityContext", w.wfSpec["securityContext"], &psc)
	var vols []corev1.Volume
	jobsStrictValue(t, "workflowSpec.volumes", w.wfSpec["volumes"], &vols)
	jobsCheckVolumes(t, "CronWorkflow", vols)

	// The DAG: a chain ingest → episodes → goals → pack → commit, each task
	// depending on exactly the one before it (the barrier between stages).
	var names []string
	for i, task := range w.tasks {
		name := jobsStr(t, "task name", task["name"])
		names = append(names, name)
		var deps []any
		if i > 0 {
			deps = []any{jobsStageChain()[i-1]}
		}
		if got, _ := task["dependencies"].([]any); !reflect.DeepEqual(got, deps) {
			t.Errorf("task %s dependencies %v, want %v", name, task["dependencies"], deps)
		}
		if _, ok := task["depends"]; ok {
			t.Errorf("task %s uses depends beside dependencies", name)
		}
	}
	if !reflect.DeepEqual(names, jobsStageChain()) {
		t.Fatalf("DAG tasks %v, want %v", names, jobsStageChain())
	}
	for _, task := range w.tasks[:4] {
		name := task["name"].(string)
		if task["template"] != "stage-worker" {
			t.Errorf("task %s template %v, want stage-worker", name, task["template"])
		}
		seq := jobsObj(t, name+".withSequence", task["withSequence"])
		jobsKeys(t, name+".withSequence", seq, "count", "start", "end", "format")
		if want := map[string]any{"count": "{{workflow.parameters.workers}}"}; !reflect.DeepEqual(seq, want) {
			t.Errorf("task %s withSequence %v, want %v", name, seq, want)
		}
		args := jobsObj(t, name+".arguments", task["arguments"])
		jobsKeys(t, name+".arguments", args, "parameters")
		order, vals := jobsParams(t, name+".arguments.parameters", args["parameters"])
		if want := map[string]string{"stage": name, "worker": "{{item}}"}; !reflect.DeepEqual(vals, want) || len(order) != 2 {
			t.Errorf("task %s passes %v, want %v", name, vals, want)
		}
	}
	if commit := w.tasks[4]; commit["template"] != "commit" || commit["withSequence"] != nil || commit["arguments"] != nil {
		t.Errorf("commit task %v, want template commit, no fan-out, no arguments", commit)
	}

	worker := w.templates["stage-worker"]
	inputs := jobsObj(t, "stage-worker.inputs", worker["inputs"])
	jobsKeys(t, "stage-worker.inputs", inputs, "parameters")
	if order, _ := jobsParams(t, "stage-worker.inputs.parameters", inputs["parameters"]); !reflect.DeepEqual(order, []string{"stage", "worker"}) {
		t.Errorf("stage-worker inputs %v, want [stage worker]", order)
	}
	retry := jobsObj(t, "stage-worker.retryStrategy", worker["retryStrategy"])
	jobsKeys(t, "stage-worker.retryStrategy", retry, "limit", "retryPolicy", "backoff", "expression")
	// limit is an IntOrString in Argo: 2 or "2".
	if l := fmt.Sprint(retry["limit"]); l != "2" {
		t.Errorf("stage-worker retryStrategy.limit %v, want 2", retry["limit"])
	}
	if b, ok := retry["backoff"]; ok {
		jobsKeys(t, "stage-worker.retryStrategy.backoff", jobsObj(t, "backoff", b), "duration", "factor", "maxDuration", "cap")
	}
	if _, ok := w.templates["commit"]["retryStrategy"]; ok {
		t.Errorf("the commit template is retried; a retried commit with an empty version could publish twice")
	}
	for name, tm := range w.templates {
		if tm["container"] == nil && tm["dag"] == nil {
			t.Errorf("template %s has neither container nor dag", name)
		}
	}
}

// jobsCheckVolumes: the config volume is the ConfigMap, whole (no items
// remapping keys), so /etc/hindcast/<key> is the file of each key.
func jobsCheckVolumes(t *testing.T, where string, vols []corev1.Volume) {
	t.Helper()
	var found bool
	for _, v := range vols {
		if v.Name != "config" {
			continue
		}
		found = true
		if v.ConfigMap == nil || v.ConfigMap.Name != jobsConfigMap || len(v.ConfigMap.Items) != 0 {
			t.Errorf("%s: volume config is %+v, want the whole ConfigMap %s", where, v.VolumeSource, jobsConfigMap)
		}
	}
	if !found {
		t.Errorf("%s: no volume named config", where)
	}
}

// ---------------------------------------------------------------------------
// Containers and their command lines

// jobsContainer is one container of jobs/ with how it is started.
type jobsContainer struct {
	where     string
	job       bool // of the rerun Job, not of the CronWorkflow
	container corev1.Container
}

// jobsContainers returns every container in jobs/: the Job's, parsed with
// the Job, and each Argo template's, parsed strictly as a corev1.Container
// (Argo's template container is that type).
func jobsContainers(t *testing.T) []jobsContainer {
	t.Helper()
	var out []jobsContainer
	docs := jobsDocs(t)
	for _, d := range docs {
		if d.kind != "Job" {
			continue
		}
		var j batchv1.Job
		jobsStrict(t, d, &j)
		for _, c := range j.Spec.Template.Spec.InitContainers {
			out = append(out, jobsContainer{d.where + " init container " + c.Name, true, c})
		}
		for _, c := range j.Spec.Template.Spec.Containers {
			out = append(out, jobsContainer{d.where + " container " + c.Name, true, c})
		}
	}
	w := jobsNightly(t)
	for _, name := range slices.Sorted(maps.Keys(w.templates)) {
		if cv, ok := w.templates[name]["container"]; ok {
			var c corev1.Container
			jobsStrictValue(t, "template "+name+" container", cv, &c)
			out = append(out, jobsContainer{"CronWorkflow template " + name, false, c})
		}
	}
	return out
}

func TestJobsContainers(t *testing.T) {
	cs := jobsContainers(t)
	if len(cs) != 3 {
		t.Errorf("found %d containers, want 3 (rerun Job, stage-worker, commit)", len(cs))
	}
	// The budget from the measured peak RSS (about 480 MiB at 1M frames,
	// about 500 MiB at 4M frames with --parallel 2 and the 512 MiB soft limit).
	want := map[string]map[corev1.ResourceName]string{
		"requests": {corev1.ResourceCPU: "2", corev1.ResourceMemory: "768Mi"},
		"limits":   {corev1.ResourceCPU: "2", corev1.ResourceMemory: "1Gi"},
	}
	for _, c := range cs {
		got := map[string]corev1.ResourceList{"requests": c.container.Resources.Requests, "limits": c.container.Resources.Limits}
		for kind, res := range want {
			if len(got[kind]) != len(res) {
				t.Errorf("%s: %s %v, want %v", c.where, kind, got[kind], res)
			}
			for name, q := range res {
				g, ok := got[kind][name]
				if !ok {
					t.Errorf("%s: %s.%s not set, want %s", c.where, kind, name, q)
				} else if g.Cmp(resource.MustParse(q)) != 0 {
					t.Errorf("%s: %s.%s = %s, want %s", c.where, kind, name, g.String(), q)
				}
			}
		}
		if c.container.Image != jobsImage {
			t.Errorf("%s: image %q, want %q", c.where, c.container.Image, jobsImage)
		}
		if want := []string{"hindcast"}; !reflect.DeepEqual(c.container.Command, want) {
			t.Errorf("%s: command %q, want %q", c.where, c.container.Command, want)
		}
		wantEnvFrom := []corev1.EnvFromSource{{SecretRef: &corev1.SecretEnvSource{
			LocalObjectReference: corev1.LocalObjectReference{Name: jobsSecret}, Optional: new(true)}}}
		if !reflect.DeepEqual(c.container.EnvFrom, wantEnvFrom) {
			t.Errorf("%s: envFrom %+v, want the Secret %s, optional", c.where, c.container.EnvFrom, jobsSecret)
		}
		var mounted bool
		for _, m := range c.container.VolumeMounts {
			if m.Name == "config" {
				mounted = m.MountPath == jobsMountPath && m.SubPath == "" && m.ReadOnly
			}
		}
		if !mounted {
			t.Errorf("%s: volume config not mounted read-only at %s: %+v", c.where, jobsMountPath, c.container.VolumeMounts)
		}
	}
}

func TestJobsRerunJob(t *testing.T) {
	var j batchv1.Job
	jobsStrict(t, jobsFind(t, jobsDocs(t), "Job", "hindcast-rerun-stage"), &j)
	s := j.Spec
	if s.CompletionMode == nil || *s.CompletionMode != batchv1.IndexedCompletion {
		t.Errorf("completionMode %v, want Indexed (it sets JOB_COMPLETION_INDEX)", s.CompletionMode)
	}
	deref := func(p *int32) string {
		if p == nil {
			return "unset"
		}
		return strconv.Itoa(int(*p))
	}
	if deref(s.Completions) != "4" || deref(s.Parallelism) != "4" {
		t.Errorf("completions %s, parallelism %s, want 4 and 4", deref(s.Completions), deref(s.Parallelism))
	}
	if deref(s.BackoffLimitPerIndex) != "2" {
		t.Errorf("backoffLimitPerIndex %s, want 2", deref(s.BackoffLimitPerIndex))
	}
	if p := s.Template.Spec; p.RestartPolicy != corev1.RestartPolicyNever || p.ServiceAccountName != jobsAccount {
		t.Errorf("restartPolicy %q, serviceAccountName %q; want Never, %s", p.RestartPolicy, p.ServiceAccountName, jobsAccount)
	}
	jobsCheckVolumes(t, "Job", s.Template.Spec.Volumes)
	// The worker count on the command line is the Job's completion count:
	// each index is one worker.
	for _, c := range s.Template.Spec.Containers {
		cmd, err := ParseCommand(c.Args, io.Discard)
		if err != nil {
			t.Fatalf("Job args %q: %v", c.Args, err)
		}
		if s.Completions == nil || cmd.Workers != int(*s.Completions) {
			t.Errorf("--workers %d differs from the Job's completions", cmd.Workers)
		}
	}
}

// jobsInvocation is one container start: its command line with every
// placeholder filled in, and JOB_COMPLETION_INDEX where Kubernetes sets it.
type jobsInvocation struct {
	where string
	task  string // the DAG task, or "" for the Job
	item  int    // the fan-out's {{item}}, -1 where there is none
	args  []string
	index string // JOB_COMPLETION_INDEX, "" where not set
}

var jobsPlaceholder = regexp.MustCompile(`\{\{\s*([^{}]*?)\s*\}\}`)

// jobsFill replaces each {{name}} with vars[name]; an unknown name fails.
func jobsFill(t *testing.T, where, s string, vars map[string]string) string {
	t.Helper()
	return jobsPlaceholder.ReplaceAllStringFunc(s, func(m string) string {
		name := jobsPlaceholder.FindStringSubmatch(m)[1]
		v, ok := vars[name]
		if !ok {
			t.Errorf("%s: placeholder %s has no value", where, m)
		}
		return v
	})
}

// jobsInvocations returns the command lines the nightly DAG starts, in task
// order, for the given item values of each fan-out, with the workflow's
// parameters at their defaults except version; then the rerun Job's, once
// per index in jobIndexes.
func jobsInvocations(t *testing.T, items []int, version string, jobIndexes []int) []jobsInvocation {
	t.Helper()
	w := jobsNightly(t)
	global := map[string]string{}
	for k, v := range w.params {
		global["workflow.parameters."+k] = v
	}
	global["workflow.parameters.version"] = version
	var out []jobsInvocation
	for _, task := range w.tasks {
		name := task["name"].(string)
		tmpl := w.templates[task["template"].(string)]
		cv := jobsObj(t, name+" container", tmpl["container"])
		args := jobsList(t, name+" args", cv["args"])
		runs := []int{-1}
		if task["withSequence"] != nil {
			runs = items
		}
		for _, item := range runs {
			vars := maps.Clone(global)
			if a, ok := task["arguments"]; ok {
				// Task arguments see the globals and the fan-out's {{item}}.
				taskVars := maps.Clone(global)
				if item >= 0 {
					taskVars["item"] = strconv.Itoa(item)
				}
				_, params := jobsParams(t, name+".arguments.parameters", jobsObj(t, name, a)["parameters"])
				for k, v := range params {
					vars["inputs.parameters."+k] = jobsFill(t, name+" argument "+k, v, taskVars)
				}
			}
			inv := jobsInvocation{where: fmt.Sprintf("task %s item %d", name, item), task: name, item: item}
			for _, a := range args {
				inv.args = append(inv.args, jobsFill(t, inv.where, jobsStr(t, name+" arg", a), vars))
			}
			out = append(out, inv)
		}
	}
	for _, c := range jobsContainers(t) {
		if !c.job {
			continue
		}
		for _, i := range jobIndexes {
			inv := jobsInvocation{where: fmt.Sprintf("%s index %d", c.where, i), item: -1, index: strconv.Itoa(i)}
			for _, a := range c.container.Args {
				inv.args = append(inv.args, jobsFill(t, c.where, a, nil))
			}
			out = append(out, inv)
		}
	}
	return out
}

func TestJobsCommandLinesParse(t *testing.T) {
	cmds := commands()
	// The expected parse of each task's command line, by hand from the
	// task's request: stage workers --worker I/4 --parallel 2, commit with
	// the version, the Job's goals with --workers 4 (its index then comes
	// from JOB_COMPLETION_INDEX, Worker -1 until then).
	type want struct {
		Name, Stage, Version string
		Worker, Workers      int
		Parallel             int
	}
	seen := map[string]int{}
	for _, version := range []string{jobsTestVersion, ""} {
		for _, inv := range jobsInvocations(t, []int{0, jobsWorkers - 1}, version, []int{0}) {
			c, err := ParseCommand(inv.args, io.Discard)
			if err != nil {
				t.Errorf("%s: ParseCommand(%q): %v", inv.where, inv.args, err)
				continue
			}
			if _, ok := cmds[c.Name]; !ok {
				t.Errorf("%s: command %q is not one of hindcast's", inv.where, c.Name)
			}
			var w want
			switch inv.task {
			case "ingest", "episodes", "goals", "pack":
				w = want{Name: "stage", Stage: inv.task, Worker: inv.item, Workers: jobsWorkers, Parallel: 2}
			case "commit":
				w = want{Name: "commit", Version: version}
			case "":
				w = want{Name: "stage", Stage: "goals", Worker: -1, Workers: jobsWorkers, Parallel: 2}
			}
			// Worker, workers and parallel mean something to stage only.
			got := want{Name: c.Name, Stage: c.Stage, Version: c.Version}
			key := c.Name
			if c.Name == "stage" {
				got.Worker, got.Workers, got.Parallel = c.Worker, c.Workers, c.Parallel
				key = fmt.Sprintf("stage %s %d/%d", c.Stage, c.Worker, c.Workers)
			}
			if got != w {
				t.Errorf("%s: %q parses to %+v, want %+v", inv.where, inv.args, got, w)
			}
			seen[key]++
			// --config names a file of the ConfigMap, which is a file of
			// configs/ (the ConfigMap test checks the content is the same).
			if c.Config != jobsConfigPath {
				t.Errorf("%s: --config %q, want %q", inv.where, c.Config, jobsConfigPath)
				continue
			}
			local := filepath.Join("configs", strings.TrimPrefix(c.Config, jobsMountPath+"/"))
			cfg, err := pipeline.LoadConfig(local)
			if err != nil {
				t.Errorf("%s: %s: %v", inv.where, local, err)
				continue
			}
			// Workers in separate pods share intermediates only through
			// object storage.
			if !strings.HasPrefix(cfg.Work, "s3://") {
				t.Errorf("%s: work area %q is not in object storage", inv.where, cfg.Work)
			}
		}
	}
	// Each of the four stages at workers 0 and 3, and commit, for each of
	// the two versions; the Job once per version.
	wantSeen := map[string]int{"commit": 2, "stage goals -1/4": 2}
	for _, st := range jobsStageChain()[:4] {
		wantSeen[fmt.Sprintf("stage %s 0/4", st)] = 2
		wantSeen[fmt.Sprintf("stage %s 3/4", st)] = 2
	}
	if !reflect.DeepEqual(seen, wantSeen) {
		t.Errorf("command lines seen %v, want %v", seen, wantSeen)
	}
}

// ---------------------------------------------------------------------------
// Running the manifests' command lines

// TestJobsCommandLinesRunInDAGOrder runs every command line of the nightly
// DAG, in its order, all four workers of each stage, on a small local fleet
// with the cluster config's locations moved to local folders; then the
// rerun Job's four indexes and a second commit. It shows that the DAG's
// shares cover every item, that a stage refuses to run before its upstream,
// and that a rerun plus commit gives the same dataset.
func TestJobsCommandLinesRunInDAGOrder(t *testing.T) {
	dir := t.TempDir()
	src, err := os.ReadFile(filepath.Join("configs", jobsConfigName))
	if err != nil {
		t.Fatal(err)
	}
	cfgText := string(src)
	for _, r := range []struct{ re, repl string }{
		{`(?m)^  uri: s3://\S+`, "  uri: logs"},
		{`(?m)^work: s3://\S+`, "work: work"},
		{`(?m)^output: s3://\S+`, "output: out"},
	} {
		re := regexp.MustCompile(r.re)
		if n := len(re.FindAllString(cfgText, -1)); n != 1 {
			t.Fatalf("%s matches %d lines of the cluster config, want 1", r.re, n)
		}
		cfgText = re.ReplaceAllString(cfgText, r.repl)
	}
	cfgPath := filepath.Join(dir, jobsConfigName)
	if err := os.WriteFile(cfgPath, []byte(cfgText), 0o644); err != nil {
		t.Fatal(err)
	}

	// The fleet: 6 picking arms and 3 carts, one object each of 12 frames
	// 100 ms apart (one episode each: max_gap 500ms, min_steps 10), values
	// within the declared bounds; and one object of the excluded unit.
	const frames = 12
	units := []string{"picker6-0001", "picker6-0002", "picker6-0003", "picker6-0004", "picker6-0005", "picker6-0006",
		"cart2-0001", "cart2-0002", "cart2-0003"}
	t0 := int64(1796086800000000000)
	writeUnit := func(unit string) string {
		emb, obs, act := "picker6", 10, 7
		if strings.HasPrefix(unit, "cart2") {
			emb, obs, act = "cart2", 5, 2
		}
		var b strings.Builder
		for i := range frames {
			o := make([]string, obs)
			for j := range o {
				o[j] = strconv.FormatFloat(float64(i)*0.125+float64(j)*0.5, 'g', -1, 64)
			}
			a := make([]string, act)
			for j := range a {
				a[j] = "0.25"
			}
			fmt.Fprintf(&b, `{"unit":%q,"embodiment":%q,"t":%d,"obs":[%s],"act":[%s]}`+"\n",
				unit, emb, t0+int64(i)*100_000_000, strings.Join(o, ","), strings.Join(a, ","))
		}
		key := "units/" + unit + "/session-0001.jsonl"
		p := filepath.Join(dir, "logs", filepath.FromSlash(key))
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(p, []byte(b.String()), 0o644); err != nil {
			t.Fatal(err)
		}
		return key
	}
	var keys []string
	for _, u := range units {
		keys = append(keys, writeUnit(u))
	}
	sort.Strings(keys)
	writeUnit("picker6-0113") // excluded by the config

	local := func(args []string) []string {
		out := slices.Clone(args)
		for i, a := range out {
			if a == jobsConfigPath {
				out[i] = cfgPath
			}
		}
		return out
	}
	run := func(inv jobsInvocation) (int, string, string) {
		t.Helper()
		if inv.index != "" {
			t.Setenv("JOB_COMPLETION_INDEX", inv.index)
		}
		var stdout, stderr bytes.Buffer
		code := Main(context.Background(), local(inv.args), &stdout, &stderr)
		return code, stdout.String(), stderr.String()
	}
	allItems := make([]int, jobsWorkers)
	for i := range allItems {
		allItems[i] = i
	}
	invs := jobsInvocations(t, allItems, jobsTestVersion, allItems)

	// The barrier matters: episodes before ingest fails with exit 1,
	// naming the stage that is not complete.
	for _, inv := range invs {
		if inv.task == "episodes" {
			code, _, errOut := run(inv)
			lines := strings.Split(strings.TrimSpace(errOut), "\n")
			if last := lines[len(lines)-1]; code != exitRuntime || !strings.Contains(last, "ingest") {
				t.Fatalf("episodes before ingest: exit %d, last line %q; want exit 1 naming ingest", code, last)
			}
			break
		}
	}

	share := regexp.MustCompile(`(?m)^stage (\w+) worker (\d+)/(\d+): (\d+) items, (\d+) reused`)
	items := map[string]int{}
	for _, inv := range invs {
		code, out, errOut := run(inv)
		if code != exitOK {
			t.Fatalf("%s: hindcast %q: exit %d\n%s\n%s", inv.where, inv.args, code, out, tail(errOut, 3000))
		}
		if inv.task == "commit" {
			continue
		}
		m := share.FindStringSubmatch(out)
		if m == nil {
			t.Fatalf("%s: no share line in %q", inv.where, out)
		}
		n, _ := strconv.Atoi(m[4])
		reused, _ := strconv.Atoi(m[5])
		if inv.task == "" {
			// The rerun of a complete stage: every item of the share is
			// sealed already, so each is reused and none recomputed.
			if reused != n {
				t.Errorf("%s: rerun computed %d of %d items again", inv.where, n-reused, n)
			}
			items["rerun "+m[1]] += n
		} else {
			if reused != 0 {
				t.Errorf("%s: %d items reused from an empty work area", inv.where, reused)
			}
			items[m[1]] += n
		}
	}
	// Ingest's items are the 9 listed objects, each run by exactly one
	// worker; the rerun's shares cover the same goals items as the DAG's.
	if items["ingest"] != len(keys) {
		t.Errorf("ingest workers ran %d items in all, want %d (one per object)", items["ingest"], len(keys))
	}
	if items["rerun goals"] != items["goals"] || items["goals"] == 0 {
		t.Errorf("rerun goals covered %d items, the DAG's goals %d", items["rerun goals"], items["goals"])
	}

	first := jobsManifest(t, filepath.Join(dir, "out"), jobsTestVersion)
	// Counts by hand: 9 episodes of 12 frames; steps 0…10 of each get
	// future 2 + geometric 1 + final 1 goals (negative 0), SPEC §3.3.
	if first.Funnel.Objects != len(keys) || first.Funnel.Lines != 9*frames || first.Funnel.Frames != 9*frames ||
		first.Funnel.Episodes != 9 || first.Funnel.Pairs != 9*(frames-1)*4 {
		t.Errorf("funnel %+v, want 9 objects, %d lines and frames, 9 episodes, %d pairs", first.Funnel, 9*frames, 9*(frames-1)*4)
	}
	var gotKeys []string
	for _, s := range first.Sources {
		gotKeys = append(gotKeys, s.Key)
	}
	if !reflect.DeepEqual(gotKeys, keys) {
		t.Errorf("manifest sources %v, want %v (the excluded unit left out)", gotKeys, keys)
	}

	// After the rerun, commit again (as rerun-stage.yaml says), with the
	// default empty version: a new version named after the UTC time, with
	// the same content.
	var commit jobsInvocation
	for _, inv := range jobsInvocations(t, []int{0}, "", nil) {
		if inv.task == "commit" {
			commit = inv
		}
	}
	code, out, errOut := run(commit)
	if code != exitOK {
		t.Fatalf("commit with the default version: exit %d\n%s\n%s", code, out, tail(errOut, 3000))
	}
	versions, err := os.ReadDir(filepath.Join(dir, "out", "aisle-pickers"))
	if err != nil {
		t.Fatal(err)
	}
	var second string
	for _, v := range versions {
		if v.Name() != jobsTestVersion {
			second = v.Name()
		}
	}
	// SPEC §6: the default version is the UTC time, YYYYMMDDTHHMMSSZ.
	if len(versions) != 2 || !regexp.MustCompile(`^[0-9]{8}T[0-9]{6}Z$`).MatchString(second) {
		t.Fatalf("versions after the second commit: %v; want %s and one named YYYYMMDDTHHMMSSZ", versions, jobsTestVersion)
	}
	if again := jobsManifest(t, filepath.Join(dir, "out"), second); again.Digest != first.Digest || first.Digest == "" {
		t.Errorf("digest after the rerun %q, before %q", again.Digest, first.Digest)
	}
}

// jobsManifestDoc is the part of manifest.json (SPEC §5) these tests read.
type jobsManifestDoc struct {
	Version string `json:"version"`
	Digest  string `json:"digest"`
	Funnel  struct {
		Objects  int `json:"objects"`
		Lines    int `json:"lines"`
		Frames   int `json:"frames"`
		Episodes int `json:"episodes"`
		Pairs    int `json:"pairs"`
	} `json:"funnel"`
	Sources []struct {
		Key string `json:"key"`
	} `json:"sources"`
}

func jobsManifest(t *testing.T, out, version string) jobsManifestDoc {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join(out, "aisle-pickers", version, "manifest.json"))
	if err != nil {
		t.Fatal(err)
	}
	var m jobsManifestDoc
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	if m.Version != version {
		t.Errorf("manifest version %q, want %q", m.Version, version)
	}
	return m
}
