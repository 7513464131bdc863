"""The manual: a man page and bash and zsh completion, all written from the live argument parser.

Nothing here is kept by hand: :func:`walk` reads the commands, options, choices and help texts that
``retuner.cli.build_parser`` defines, and :func:`man_page` and :func:`bash_completion` write them out, so
the two can never lag behind the options. argparse has no public way to list a parser's arguments; the
walk reads ``parser._actions`` (stable across Python 3 releases) in this one place.

Formats: the man page uses the man(7) macros (``.TH``, ``.SH``, ``.SS``, ``.TP``) as groff renders them;
the bash completion is a function for ``complete -F`` (bash manual, "Programmable Completion"); the zsh
completion is a function for zsh's completion system (``#compdef``, ``_arguments``, ``_describe``; zsh
manual, "Completion System").
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass, field


@dataclass
class Option:
    flags: list[str]                 # ["-o", "--output"]; a positional has none
    metavar: str                     # what follows the flag (or names the positional)
    takes_value: bool
    choices: list[str] | None
    help: str
    repeat: bool = False             # may be given more than once (an append or count action)
    many: bool = False               # a positional taking several words (nargs * or +)


@dataclass
class Command:
    path: tuple[str, ...]            # () for retuner itself, ("ctl", "load") for a nested one
    help: str
    description: str
    options: list[Option] = field(default_factory=list)
    positionals: list[Option] = field(default_factory=list)
    children: dict[str, "Command"] = field(default_factory=dict)

    def all(self):
        """This command and every command below it, depth first, in the parser's order."""
        yield self
        for child in self.children.values():
            yield from child.all()


def _help_text(action: argparse.Action, prog: str) -> str:
    """The help string with its %(...)s fields filled in, as argparse's help output shows it."""
    text = action.help or ""
    if "%" not in text:
        return text
    params = {k: v for k, v in vars(action).items() if v is not argparse.SUPPRESS}
    if params.get("choices") is not None:
        params["choices"] = ", ".join(map(str, params["choices"]))
    params["prog"] = prog
    return text % params


def _metavar(action: argparse.Action) -> str:
    if action.metavar is not None:
        return action.metavar if isinstance(action.metavar, str) else " ".join(action.metavar)
    if action.choices is not None and not isinstance(action, argparse._SubParsersAction):
        return "{" + ",".join(map(str, action.choices)) + "}"
    return action.dest.upper() if action.option_strings else action.dest


def walk(parser: argparse.ArgumentParser, path: tuple[str, ...] = (), help: str = "") -> Command:
    """The command tree of ``parser``: options, positionals and sub-commands, with their help."""
    cmd = Command(path=path, help=help, description=parser.description or help)
    for action in parser._actions:                   # the one private read: argparse lists no other way
        if action.help == argparse.SUPPRESS:
            continue
        if isinstance(action, argparse._SubParsersAction):
            helps = {a.dest: a.help or "" for a in action._choices_actions}
            for name, sub in action.choices.items():
                if name in helps:                     # aliases have no help entry of their own
                    cmd.children[name] = walk(sub, path + (name,), helps[name])
            continue
        choices = None if action.choices is None else [str(c) for c in action.choices]
        opt = Option(flags=list(action.option_strings), metavar=_metavar(action),
                     takes_value=action.nargs != 0, choices=choices, help=_help_text(action, parser.prog),
                     repeat=isinstance(action, (argparse._AppendAction, argparse._CountAction)),
                     many=action.nargs in ("*", "+", argparse.REMAINDER))
        (cmd.options if action.option_strings else cmd.positionals).append(opt)
    return cmd


# --- man page ----------------------------------------------------------------------------------------

def _roff(text: str) -> str:
    """Text safe for roff: backslashes and minus signs escaped, no line starting a request."""
    text = text.replace("\\", "\\e").replace("-", "\\-")
    lines = [("\\&" + line) if line.startswith((".", "'")) else line for line in text.splitlines()]
    return "\n".join(lines)


def _option_tag(opt: Option) -> str:
    flags = ", ".join(f"\\fB{_roff(f)}\\fR" for f in opt.flags)
    if opt.takes_value:
        flags += f" \\fI{_roff(opt.metavar)}\\fR"
    return flags


ENVIRONMENT = [
    ("XDG_CONFIG_HOME", "where the config and your own profiles are (default ~/.config)."),
    ("XDG_RUNTIME_DIR", "where the control socket is."),
    ("JACK_DEFAULT_SERVER", "the JACK server to use (--backend jack), when it is not the default one."),
    ("JOURNAL_STREAM", "set by systemd when standard error goes to the journal: the log then drops its "
                       "time stamps and marks each line's priority."),
    ("NOTIFY_SOCKET", "set by systemd for a Type=notify service: the daemon reports ready and pings the "
                      "watchdog there."),
]

EXIT_STATUS = [
    ("0", "success."),
    ("1", "something retuner needs is not there (yet): the MIDI system, a running daemon; in a folder "
          "conversion, a file that failed while the others were written. A service manager may retry."),
    ("2", "a mistake in what was written: an option, the config file, a profile or a MIDI file. The "
          "message names it (file, line and field); nothing was half-written."),
    ("130", "interrupted (Ctrl-C)."),
]

FILES = [
    ("$XDG_CONFIG_HOME/retuner/config.yaml",
     "the daemon's settings (~/.config/retuner/config.yaml); options override them."),
    ("$XDG_CONFIG_HOME/retuner/profiles/", "your own profiles (tunings as YAML)."),
    ("$XDG_RUNTIME_DIR/retuner/control.sock", "the control socket of a running daemon (retuner ctl, watch)."),
]


def man_page(parser: argparse.ArgumentParser, version: str) -> str:
    """The whole man page (section 1) in man(7) macros."""
    top = walk(parser)
    name = parser.prog
    out = [f'.TH {name.upper()} 1 "" "{name} {_roff(version)}" "User Commands"',
           ".nh", ".ad l",                            # no hyphenation: options stay whole, copyable
           ".SH NAME", f"{name} \\- {_roff(top.description)}",
           ".SH SYNOPSIS", f".B {name}", "[\\fIOPTIONS\\fR] \\fICOMMAND\\fR [\\fIARGUMENTS\\fR]",
           ".SH DESCRIPTION", _roff(top.description),
           "Each command has its own options, listed below and by",
           f"\\fB{name} \\fICOMMAND\\fB \\-\\-help\\fR.",
           ".SH OPTIONS"]
    for opt in top.options:
        out += [".TP", _option_tag(opt), _roff(opt.help)]
    out.append(".SH COMMANDS")
    for cmd in top.all():
        if not cmd.path:
            continue
        synopsis = [f"\\fI{_roff(p.metavar)}\\fR" for p in cmd.positionals]
        if cmd.children:
            synopsis.append("\\fICOMMAND\\fR")
        out += [f'.SS "{_roff(" ".join((name,) + cmd.path))}"',
                f"\\fB{_roff(' '.join((name,) + cmd.path))}\\fR [\\fIOPTIONS\\fR] " + " ".join(synopsis),
                ".PP", _roff(cmd.description)]
        for opt in cmd.positionals:
            out += [".TP", f"\\fI{_roff(opt.metavar)}\\fR", _roff(opt.help)]
        for opt in cmd.options:
            out += [".TP", _option_tag(opt), _roff(opt.help)]
        if cmd.children:
            out += [".TP", "\\fICOMMAND\\fR",
                    _roff("one of: " + ", ".join(cmd.children) + " (each described below)")]
    out.append(".SH FILES")
    for path, text in FILES:
        out += [".TP", f"\\fI{_roff(path)}\\fR", _roff(text)]
    out.append(".SH ENVIRONMENT")
    for var, text in ENVIRONMENT:
        out += [".TP", f"\\fB{var}\\fR", _roff(text)]
    out.append(".SH EXIT STATUS")
    for status, text in EXIT_STATUS:
        out += [".TP", f"\\fB{status}\\fR", _roff(text)]
    out += [".SH SEE ALSO", "\\fBsystemctl\\fR(1), \\fBjournalctl\\fR(1), \\fBaconnect\\fR(1), "
            "\\fBjack_lsp\\fR(1)"]
    return "\n".join(out) + "\n"


# --- bash completion ---------------------------------------------------------------------------------

def _sh_words(words) -> str:
    return " ".join(words)


def bash_completion(parser: argparse.ArgumentParser) -> str:
    """A bash script defining ``_NAME`` and registering it with ``complete -F`` for the command."""
    top = walk(parser)
    name = parser.prog
    fn = "_" + name.replace("-", "_")
    skip, descend, value_cases, word_cases = [], [], [], []
    for cmd in top.all():
        key = " ".join(cmd.path)
        for opt in cmd.options:
            if opt.takes_value:
                pats = "|".join(f'"{key}|{f}"' for f in opt.flags)
                skip.append(pats)
                if opt.choices:
                    value_cases.append(f'            {pats}) COMPREPLY=($(compgen -W "{_sh_words(opt.choices)}" '
                                       f'-- "$cur")); return ;;')
                else:
                    value_cases.append(f'            {pats}) COMPREPLY=($(compgen -f -- "$cur")); return ;;')
        for child in cmd.children:
            descend.append(f'            "{key}|{child}") path="{" ".join(cmd.path + (child,))}" ;;')
        flags = [f for opt in cmd.options for f in opt.flags]
        words = list(cmd.children) + [c for p in cmd.positionals for c in (p.choices or [])]
        files = any(p.choices is None for p in cmd.positionals)
        word_cases.append(f'            "{key}") flags="{_sh_words(flags)}"; words="{_sh_words(words)}"; '
                          f'files={int(files)} ;;')
    lines = [
        f"# bash completion for {name}, written by '{name} completion bash' from its argument parser",
        f"{fn}()",
        "{",
        '    local cur=${COMP_WORDS[COMP_CWORD]} prev=${COMP_WORDS[COMP_CWORD-1]}',
        '    local path="" word i skip=0 flags="" words="" files=0',
        "    COMPREPLY=()",
        "    # the command path so far (run, ctl load ...), stepping over the values of options",
        "    for ((i = 1; i < COMP_CWORD; i++)); do",
        '        word=${COMP_WORDS[i]}',
        "        if ((skip)); then skip=0; continue; fi",
        '        case "$path|$word" in',
        *([f"            {'|'.join(skip)}) skip=1 ;;"] if skip else []),
        *descend,
        "        esac",
        "    done",
        "    # the value of an option: its choices, else a file name",
        '    case "$path|$prev" in',
        *value_cases,
        "    esac",
        '    case "$path" in',
        *word_cases,
        "    esac",
        '    if [[ $cur == -* ]]; then',
        '        COMPREPLY=($(compgen -W "$flags" -- "$cur"))',
        "    else",
        '        COMPREPLY=($(compgen -W "$words" -- "$cur"))',
        '        if ((files)); then COMPREPLY+=($(compgen -f -- "$cur")); fi',
        "    fi",
        "}",
        f"complete -o filenames -F {fn} {name}",
    ]
    return "\n".join(lines) + "\n"


# --- zsh completion ----------------------------------------------------------------------------------

def _zq(text: str) -> str:
    """``text`` inside single quotes in zsh."""
    return text.replace("'", "'\\''")


def _z_help(text: str) -> str:
    """An option's help for the brackets of an ``_arguments`` spec: one line, its first sentence
    (cut at 72 characters), with the characters that end the brackets escaped."""
    text = " ".join(text.split()).split(". ", 1)[0]
    if len(text) > 72:
        text = text[:69].rsplit(" ", 1)[0] + "..."
    return _zq(text.replace("\\", "\\\\").replace("[", "\\[").replace("]", "\\]"))


def _z_value(opt: Option) -> str:
    """``:MESSAGE:ACTION`` for the value of an option or a positional: its choices, else a file."""
    message = _zq(opt.metavar.replace(":", "\\:")) or "value"
    if opt.choices:
        words = " ".join(_zq(c.replace(" ", "\\ ").replace("(", "\\(").replace(")", "\\)")) for c in opt.choices)
        return f":{message}:({words})"
    return f":{message}:_files"


def _z_option(opt: Option) -> list[str]:
    """The ``_arguments`` specs of one option: each flag, with the others excluded once it is given
    (unless it may be repeated), and its value."""
    out = []
    exclude = "" if opt.repeat or len(opt.flags) < 2 else "(" + " ".join(opt.flags) + ")"
    for flag in opt.flags:
        value = ""
        if opt.takes_value:
            # --name=VALUE or --name VALUE; -o VALUE or -oVALUE: as argparse reads them
            flag_spec = flag + ("=" if flag.startswith("--") else "+")
            value = _z_value(opt)
        else:
            flag_spec = flag
        star = "*" if opt.repeat else ""
        out.append(f"'{exclude}{star}{flag_spec}[{_z_help(opt.help)}]{value}'")
    return out


def _z_fn(name: str, path: tuple[str, ...]) -> str:
    return "_" + "__".join((name,) + path).replace("-", "_")


def zsh_completion(parser: argparse.ArgumentParser) -> str:
    """A zsh script for the completion system: one function per command (``_arguments`` with its
    options and positionals; sub-commands offered with their help by ``_describe`` and handed on
    to their own function). Install it as ``_NAME`` in a folder of ``$fpath``, or source it after
    ``compinit``."""
    top = walk(parser)
    name = parser.prog
    lines = [f"#compdef {name}",
             f"# zsh completion for {name}, written by '{name} completion zsh' from its argument parser",
             ""]
    for cmd in top.all():
        fn = _z_fn(name, cmd.path)
        specs = [spec for opt in cmd.options for spec in _z_option(opt)]
        for i, pos in enumerate(cmd.positionals, 1):
            specs.append(f"'{'*' if pos.many else i}{_z_value(pos)}'")
        if cmd.children:
            specs += ["': :->command'", "'*:: :->argument'"]
        lines.append(f"{fn}() {{")
        if cmd.children:
            lines.append("    local curcontext=$curcontext state line ret=1")
            lines.append("    typeset -A opt_args")
        lines.append("    _arguments -S" + (" -C" if cmd.children else "") + " \\")
        lines += [f"        {spec} \\" for spec in specs]
        lines[-1] = lines[-1][: -len(" \\")] + (" && ret=0" if cmd.children else "")
        if cmd.children:
            described = " ".join(
                "'" + _zq(child.replace(":", "\\:") + ":" + " ".join(sub.help.split())) + "'"
                for child, sub in cmd.children.items())
            lines += [
                "    case $state in",
                "        command)",
                f"            local -a commands=({described})",
                f"            _describe -t commands '{_zq(' '.join((name,) + cmd.path))} command' commands && ret=0",
                "            ;;",
                "        argument)",
                "            curcontext=${curcontext%:*:*}:" + "-".join((name,) + cmd.path) + "-$words[1]:",
                "            case $words[1] in",
                *[f"                {child}) {_z_fn(name, cmd.path + (child,))} && ret=0 ;;"
                  for child in cmd.children],
                "            esac",
                "            ;;",
                "    esac",
                "    return ret",
            ]
        lines.append("}")
        lines.append("")
    lines += [
        "# loaded from $fpath by compinit (autoload): complete now; sourced: register with compdef",
        'if [[ $zsh_eval_context[-1] == loadautofunc ]]; then',
        f'    {_z_fn(name, ())} "$@"',
        "else",
        f"    compdef {_z_fn(name, ())} {name}",
        "fi",
    ]
    return "\n".join(lines) + "\n"


SHELLS = {"bash": bash_completion, "zsh": zsh_completion}
