"""``retuner completion SHELL``: shell completion, written from the argument parser."""

from __future__ import annotations

from retuner.manual import SHELLS

NAME = "completion"
HELP = "print a shell completion script, written from the options themselves"
ORDER = 91
DESCRIPTION = ("Print a completion script for the shell, made from the same argument parser as every "
               "--help: commands, options and their choices. For bash: "
               "'retuner completion bash > ~/.local/share/bash-completion/completions/retuner' "
               "(read by the bash-completion package), or 'source <(retuner completion bash)' in ~/.bashrc. "
               "For zsh: 'retuner completion zsh > ~/.zfunc/_retuner' with 'fpath=(~/.zfunc $fpath)' before "
               "compinit in ~/.zshrc, or 'source <(retuner completion zsh)' after compinit.")


def add_arguments(parser) -> None:
    parser.add_argument("shell", choices=sorted(SHELLS), help="the shell to complete for")


def run(args) -> int:
    print(SHELLS[args.shell](args._parser), end="")
    return 0
