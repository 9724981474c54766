// Command schema-check validates deploy/compose.yaml with the Compose
// specification's own loader (compose-go: JSON schema, interpolation,
// normalization) and every object in deploy/k8s/*.yaml by strict decoding
// into the Kubernetes API types (unknown or misspelled fields fail).
//
//	cd deploy/schema-check && go run . ..
//
// deploy/check.sh runs it when Go is installed.
package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"

	"github.com/compose-spec/compose-go/v2/cli"
	appsv1 "k8s.io/api/apps/v1"
	corev1 "k8s.io/api/core/v1"
	policyv1 "k8s.io/api/policy/v1"
	"sigs.k8s.io/yaml"
)

func main() {
	if len(os.Args) != 2 {
		fmt.Fprintln(os.Stderr, "usage: schema-check DEPLOY_DIR")
		os.Exit(2)
	}
	deploy := os.Args[1]
	failed := 0
	if err := checkCompose(deploy); err != nil {
		fmt.Printf("  FAIL compose.yaml against the Compose specification: %v\n", err)
		failed++
	} else {
		fmt.Println("  ok   compose.yaml against the Compose specification")
	}
	failed += checkK8s(deploy)
	if failed > 0 {
		os.Exit(1)
	}
}

// checkCompose loads compose.yaml. The env file with the secret
// (apportion.env) is not in version control, so when it is missing the file
// is checked from a temporary copy that uses apportion.env.example instead.
func checkCompose(deploy string) error {
	dir := deploy
	if _, err := os.Stat(filepath.Join(deploy, "apportion.env")); os.IsNotExist(err) {
		tmp, err := os.MkdirTemp("", "apportion-compose-")
		if err != nil {
			return err
		}
		defer os.RemoveAll(tmp)
		for src, dst := range map[string]string{"compose.yaml": "compose.yaml", "apportion.env.example": "apportion.env"} {
			data, err := os.ReadFile(filepath.Join(deploy, src))
			if err != nil {
				return err
			}
			if err := os.WriteFile(filepath.Join(tmp, dst), data, 0o600); err != nil {
				return err
			}
		}
		dir = tmp
	}
	opts, err := cli.NewProjectOptions([]string{filepath.Join(dir, "compose.yaml")},
		cli.WithWorkingDirectory(dir), cli.WithResolvedPaths(true))
	if err != nil {
		return err
	}
	_, err = opts.LoadProject(context.Background())
	return err
}

func checkK8s(deploy string) int {
	failed := 0
	files, _ := filepath.Glob(filepath.Join(deploy, "k8s", "*.yaml"))
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			fmt.Printf("  FAIL %s: %v\n", f, err)
			failed++
			continue
		}
		for _, doc := range bytes.Split(data, []byte("\n---")) {
			var meta struct{ Kind string }
			if err := yaml.Unmarshal(doc, &meta); err != nil {
				fmt.Printf("  FAIL %s: %v\n", filepath.Base(f), err)
				failed++
				continue
			}
			var obj any
			switch meta.Kind {
			case "StatefulSet":
				obj = &appsv1.StatefulSet{}
			case "Service":
				obj = &corev1.Service{}
			case "ConfigMap":
				obj = &corev1.ConfigMap{}
			case "Secret":
				obj = &corev1.Secret{}
			case "PodDisruptionBudget":
				obj = &policyv1.PodDisruptionBudget{}
			case "", "Kustomization":
				continue
			default:
				fmt.Printf("  FAIL %s: kind %s is not known to this check\n", filepath.Base(f), meta.Kind)
				failed++
				continue
			}
			if err := yaml.UnmarshalStrict(doc, obj); err != nil {
				fmt.Printf("  FAIL %s (%s) against the Kubernetes API types: %s\n", filepath.Base(f), meta.Kind, strings.TrimSpace(err.Error()))
				failed++
			} else {
				fmt.Printf("  ok   %s (%s) against the Kubernetes API types\n", filepath.Base(f), meta.Kind)
			}
		}
	}
	if len(files) == 0 {
		fmt.Println("  FAIL no deploy/k8s/*.yaml found")
		failed++
	}
	return failed
}
