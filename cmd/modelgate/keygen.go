package main

import (
	"fmt"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/release"
)

type keygenOptions struct {
	Out  string
	Name string
}

func (o *keygenOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Out, "out", "", "write PREFIX.key.pem (private, mode 0600) and PREFIX.pub.pem (required)")
	cmd.Flags().StringVar(&o.Name, "name", "", "who holds the key, for the policy entry it prints (default: the base name of PREFIX)")
}

func newKeygenCmd(g *globals) *cobra.Command {
	o := &keygenOptions{}
	cmd := &cobra.Command{
		Use:   "keygen --out PREFIX [--name NAME]",
		Short: "Make an ed25519 key pair for approvals, release records and signed gate reports",
		Long: `keygen makes an ed25519 key pair: PREFIX.key.pem, the private key (PKCS#8
PEM, mode 0600: keep it secret), and PREFIX.pub.pem, the public key (SPKI
PEM) to list in a policy. Both are plain standard PEM that openssl reads
(openssl pkey -in PREFIX.key.pem -noout); the holder's name is not in them
but in the policy entry, which keygen prints with the public key inline. It
prints the key id — the first 16 hex digits of the sha256 of the public
key's DER encoding — and never prints the private key. Existing files are
never overwritten.

Every command that reads a key (approve --key, promote --key, rollback
--key, gate --sign-key, a policy's keyFile) takes env:VAR (the PEM text in
an environment variable, e.g. from a CI secret), file:PATH or a path, and
the commands take - for standard input.`,
		Args: exactArgs(0, "(none)"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runKeygen(g, o)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runKeygen(g *globals, o *keygenOptions) error {
	if o.Out == "" {
		return usageErr("keygen needs --out PREFIX")
	}
	name := o.Name
	if name == "" {
		name = strings.TrimSuffix(filepath.Base(o.Out), filepath.Ext(o.Out))
	}
	k, err := release.GenerateKey(name)
	if err != nil {
		return err
	}
	priv, pub, err := release.WriteKeyFiles(o.Out, k)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]string{"keyId": k.ID, "name": k.Name, "privateKey": priv, "publicKey": pub})
	}
	w := g.Stdout
	fmt.Fprintf(w, "key id:      %s\nname:        %s\nprivate key: %s (keep it secret)\npublic key:  %s\n", k.ID, k.Name, priv, pub)
	fmt.Fprintf(w, "\nList it in a policy's approvals (or reportSigners), the key inline:\n  - name: %s\n    keyId: \"%s\"   # quoted: a key id of digits alone would read as a number\n    publicKey: |\n", k.Name, k.ID)
	for _, line := range strings.Split(strings.TrimRight(string(k.PublicPEM()), "\n"), "\n") {
		fmt.Fprintf(w, "      %s\n", line)
	}
	fmt.Fprintf(w, "or by file (relative to the policy file): keyFile: %s\n", filepath.ToSlash(pub))
	return nil
}
