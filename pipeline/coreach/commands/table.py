"""The command table: one entry per subcommand, read by the CLI (dispatch, help, summaries) and by recipes."""

from __future__ import annotations

import importlib
import textwrap
from dataclasses import dataclass

from coreach.runtime.cautions import caution_text, cautions

HELP_WIDTH = 100


@dataclass(frozen=True)
class Command:
    """One subcommand. Adding a command is adding one of these to COMMANDS (and its conf/ file if it takes
    Hydra overrides); `coreach --help`, `coreach NAME --help`, dispatch and the summary all come from it."""

    name: str  # as typed: "vet", or "bench train" for a command in a group
    run: str  # "module:function": with `config`, it takes the composed config and returns a summary dict;
    #           without, it takes (arguments, as_json) and returns the exit code (it prints its own output)
    about: str  # one line for `coreach --help`
    usage: str  # the synopsis after "usage: "
    help: str  # one paragraph: what it does, its options, an example
    config: str | None = None  # Hydra config name (conf/coreach_conf/<config>.yaml); None: a plain command
    show: str | None = None  # "module:function(console, summaries, name)" printing the terminal summary
    one_summary: bool = False  # --json prints the one summary itself instead of {"runs": [...]}
    toward_person: bool = False  # leads toward a person or a robot: help, output and --json carry the cautions
    records_person: bool = False  # a person's drives are recorded or used: the cautions add ethics and consent
    prints_cautions: bool = False  # its own output places the cautions (after what it published, at start, ...)
    study: bool = False  # plans or analyses a user study: the cautions add ethics approval and consent for it

    @property
    def hydra(self) -> bool:
        return self.config is not None

    def cautions(self) -> list[str]:
        """What its help, terminal output and --json end with ([] when it leads toward no person)."""
        if not (self.toward_person or self.records_person or self.study):
            return []
        return cautions(recording=self.records_person, study=self.study)

    def help_text(self) -> str:
        """`coreach NAME --help`."""
        parts = [f"usage: {self.usage}", textwrap.fill(self.help, HELP_WIDTH, break_on_hyphens=False)]
        if self.hydra:
            parts.append(textwrap.fill(
                f"Takes Hydra overrides (key=value) and -m for sweeps; `coreach {self.name} --cfg job` prints the "
                "composed config, `--hydra-help` Hydra's own help. --json prints only the summary on stdout.",
                HELP_WIDTH, break_on_hyphens=False))  # fmt: skip
        if self.cautions():
            parts.append(caution_text(recording=self.records_person, width=HELP_WIDTH, study=self.study))
        return "\n\n".join(parts) + "\n"


_HYDRA = "[-m] [key=value ...]"

COMMANDS: dict[str, Command] = {c.name: c for c in (
    Command(
        "demo", "coreach.demo:run_demo", config="demo", show="coreach.commands.summaries:show_demo",
        one_summary=True, toward_person=True,
        about="generate demonstrations, train the decoder recipes briefly, vet, release, field and replay the best",
        usage=f"coreach demo {_HYDRA}",
        help="The whole job end to end on the shipped defaults: demonstrations of the bedside shelf, a short "
             "training of each recipe in demo.variants (overrides for all of them in demo.overrides), vetting "
             "with the baselines (demo.vet.suite, demo.vet.episodes, demo.vet.baselines), then the release gate "
             "on the best decoder, fielding it, a few seconds in a runtime session and a replay "
             "(demo.release.enabled, demo.release.max_tries, demo.release.overrides, demo.release.tryout_s). "
             "Any training option applies too (coreach demo trainer.max_epochs=5).",
    ),
    Command(
        "train", "coreach.training.run:train", config="train", show="coreach.commands.summaries:show_train",
        about="train one decoder (coreach train model=vae trainer.max_epochs=5)",
        usage=f"coreach train {_HYDRA}",
        help="Trains one decoder on the demonstrations and logs it on an MLflow run. Options: model= (linear, "
             "vae, cvae), loss=[...] (reconstruction, kl, goal_entropy), dataset= (scripted_shelf, parquet_file "
             "with dataset.path=), robot=, belief=, seed=, label=, run_name=, data.* (batch size, split), "
             "trainer.* (max_epochs, patience, ...), tracking= (local, server), resume=<run id>; presets with "
             "+experiment=cvae_goal_entropy. Example: coreach train -m model=linear,vae,cvae seed=0,1,2.",
    ),
    Command(
        "aggregate", "coreach.aggregation.stage:aggregate", config="aggregate",
        show="coreach.commands.summaries:show_aggregate",
        about="train, then retrain on closed-loop states labelled by the demonstrator (DAgger rounds)",
        usage=f"coreach aggregate {_HYDRA}",
        help="Trains a decoder (or starts from aggregate.start_run), then for each of aggregate.rollout_seeds "
             "rolls it out against aggregate.operators in the episodes of aggregate.rollout, has the labeller "
             "(labeller=scripted) label the visited states, adds them to the data and trains again; every "
             "round's decoder is scored on fixed episodes (aggregate.score_seed). Training options as for "
             "train. Example: coreach aggregate +experiment=cvae_goal_entropy 'aggregate.rollout_seeds=[1,2,3]'.",
    ),
    Command(
        "falsify", "coreach.falsify.stage:falsify", config="falsify", show="coreach.commands.summaries:show_falsify",
        one_summary=True, toward_person=True,
        about="search a scenario space for the episodes that break a decoder: coreach falsify decoder=NAME@ALIAS",
        usage=f"coreach falsify {_HYDRA}",
        help="Searches a declared scenario space (conf/falsify/: switch time and goals, operator rationality, "
             "noise, tremor and delay, per-goal layout shift, start pose) for the episodes a decoder fails, "
             "through the vetting loop with its filter and world; every scenario gets a continuous robustness "
             "score (negative = failed). optuna's TPE sampler searches; random search with the same budget runs "
             "beside it. Writes the failures, the search curves and an HTML report (logged to MLflow), and a "
             "counterexample suite that coreach vet suite=<file> runs; for a registered model it joins "
             ".coreach/counterexamples/NAME/. Options: decoder= (run id, NAME@ALIAS, models:/NAME/VERSION, "
             "folder), falsify= (space), falsify.bounds.<parameter>=[low,high], budget=, batch=, seed=, "
             "optimizer= (tpe, random), baseline=false, keep=, repeats=, report_dir=, log=false. Example: "
             "coreach falsify decoder=shelf-decoder@candidate budget=2000.",
    ),
    Command(
        "vet", "coreach.vetting.stage:vet", config="vet", show="coreach.commands.summaries:show_vet",
        one_summary=True, toward_person=True,
        about="closed-loop vetting: coreach vet 'candidates=[<run id>,direct,blend]' suite=goal-switch",
        usage=f"coreach vet {_HYDRA}",
        help="Steps every candidate through a suite of simulated episodes (the safety filter in the loop) and "
             "writes an HTML report with success, recovery after a goal switch, separation from the scene's "
             "bodies and the causes of failures. Options: candidates=[...] (MLflow run ids, models:/NAME/VERSION "
             "or models:/NAME@ALIAS, decoder folders, baselines direct and blend), suite= (nominal, goal-switch, "
             "held-out, or ./my-suite.yaml) with suite.* (episodes, seed, ...), scenario=, operator=, "
             "drives=[...] (recorded test drives to report beside them), report_dir=, trajectories=true, "
             "log=false (no MLflow runs), robot=, belief=, safety=, tracking=. Example: coreach vet "
             "'candidates=[<run id>,direct,blend]' suite=held-out suite.episodes=20.",
    ),
    Command(
        "recipes", "coreach.commands.recipes.run:recipes", config="recipes",
        show="coreach.commands.recipes.render:show_recipes", one_summary=True,
        about="train each recipe over several seeds, vet them with the baselines, one table",
        usage=f"coreach recipes {_HYDRA}",
        help="Trains every recipe (recipes.<label>: {command: train|aggregate, overrides: [...]}, narrowed by "
             "select=[...]) once per training seed (seeds=[...]), vets all of them and the baselines "
             "(baselines=[...]) on each suite of vet_suites=[...] (episodes= to shorten every suite), and "
             "writes results.md, results.csv and results.json to out=, also logged on one MLflow run. "
             "train_overrides=[...] and vet_overrides=[...] apply to every training and vetting. Example: "
             "coreach recipes 'select=[cvae,cvae+goal_entropy]' 'seeds=[0,1,2]' "
             "'train_overrides=[\"trainer.max_epochs=5\"]'.",
    ),
    Command(
        "check-reach", "coreach.commands.check_reach:run", config="check_reach",
        show="coreach.commands.summaries:show_reach",
        about="can the arm, where the robot config places it, reach every goal of a scene (before data is made)",
        usage=f"coreach check-reach {_HYDRA}",
        help="For each goal of scene= (a shipped scene or a YAML file): is the approach pose and the fine motion "
             "reachable, clear of the scene's bodies, how far from the joint limits and how well-conditioned; "
             "if a goal is out of reach, a base shift that reaches all of them (reach.shift_range bounds the "
             "search). Options: robot= and robot.* (urdf, tool_link, base_xyz, ...), scene=, reach.*, "
             "min_limit_margin=, min_manipulability=. Example: coreach check-reach robot.urdf=arm.urdf "
             "robot.tool_link=tcp scene=my_scene.yaml.",
    ),
    Command(
        "import-recordings", "coreach.recordings.import_command:import_recordings", config="import_recordings",
        show="coreach.commands.summaries:show_import", records_person=True,
        about="ROS 2 bags (sqlite3, MCAP) and CSV files -> one Parquet file of demonstrations",
        usage=f"coreach import-recordings {_HYDRA}",
        help="Reads every recording of inputs=[...] (bag folders or CSV files), checks its timing (gaps, "
             "duplicates, steps backwards), resamples it to dt= (default: the scene's), cuts it where the goal "
             "label changes and writes one Parquet file of demonstrations to out=. Options: scene=, robot=, "
             "topics.* (which topic holds what), checks.*, min_steps=. Example: coreach import-recordings "
             "'inputs=[bags/run1,run2.csv]' scene=bedside_shelf out=lab.parquet.",
    ),
    Command(
        "relabel-drives", "coreach.testdrive.finetune:relabel_command", config="relabel_drives",
        show="coreach.commands.summaries:show_relabel", records_person=True,
        about="recorded test drives -> training data for one fine-tuning round (the demonstrator's labels)",
        usage=f"coreach relabel-drives {_HYDRA}",
        help="Turns recorded test drives (drives=[...]: Parquet files or folders of them) into demonstrations: "
             "each recorded state keeps its place and gets the demonstrator's action toward the drive's goal. "
             "Writes them to out=, merged with an existing demonstration file when merge= names one. Example: "
             "coreach relabel-drives 'drives=[drives/]' out=person.parquet merge=demos.parquet.",
    ),
    Command(
        "plugins", "coreach.commands.plugins:plugins_command",
        about="list every registered plugin by kind, with where it came from",
        usage="coreach [--json] plugins",
        help="Every plugin option (robots, datasets, belief models, networks, loss terms, baseline interfaces, "
             "simulated operators, labellers) with the class it builds and the package it comes from "
             "(built-in, or a lab's package through the coreach.plugins entry point). Takes no arguments.",
    ),
    Command(
        "compare", "coreach.commands.compare:compare_command",
        about="leaderboard of an experiment's training runs: table, CSV and PNG",
        usage="coreach [--json] compare [--experiment NAME] [--sweep TAG] [--out DIR] [--uri URI] [--sort METRIC] "
              "[--limit N]",
        help="Ranks the training runs of one MLflow experiment with their vetting figures where they were "
             "vetted, and writes leaderboard.csv and leaderboard.png. Options: --experiment NAME (default "
             "coreach), --sweep TAG (only the runs of one sweep, their coreach.sweep tag), --out DIR (default "
             "reports/compare), --uri URI (tracking URI or a sqlite file; default COREACH_TRACKING_URI, else "
             "MLFLOW_TRACKING_URI, else ./mlflow.db), --sort METRIC (lowest first; default the best validation "
             "reconstruction), --limit N (only the best N runs).",
    ),
    Command(
        "release", "coreach.release.stage:release", config="release", show="coreach.commands.summaries:show_release",
        one_summary=True, toward_person=True, prints_cautions=True,
        about="gate a trained decoder and, if it passes, bundle, register and mark it gate-passed",
        usage="coreach release run=<training run id> [key=value ...]",
        help="Runs the release gate on a trained decoder (run=, required): closed-loop vetting on gate_suites "
             "(episodes= to shorten them), limit checks, ONNX export and parity (parity_n=), and the runtime "
             "session's latency (latency.*), each against its threshold under gates.*. If every gate passes, "
             "the bundle (decoder, manifest, model card) is published to the tracking store and registered as "
             "a version of name= (default bedside-shelf-decoder), cached under out_dir=; it is not fielded "
             "(that is coreach promote). A refusal prints the gate table, writes nothing and exits 3. Example: "
             "coreach release run=<run id> name=bedside-shelf-decoder.",
    ),
    Command(
        "replay", "coreach.release.replay:replay", config="replay", show="coreach.commands.summaries:show_replay",
        one_summary=True, toward_person=True,
        about="replay a release bundle's ONNX decoder through a suite and compare with its vetting",
        usage=f"coreach replay bundle=<folder>|<name>@<alias>|<name>/<version> {_HYDRA}",
        help="Runs a bundle's own ONNX decoder in the vetting loop on a suite and compares the figures with the "
             "vetting recorded at its release. Options: bundle= (required: releases/<name>/v<version>, or "
             "<name>@fielded and <name>/<version>, taken from the tracking store, verified and cached under "
             "releases/), suite= and suite.*, threads=, tolerance.*, fail_on_mismatch= (default true: exit 3 "
             "when the replay does not match). Example: coreach replay bundle=bedside-shelf-decoder@fielded "
             "suite=held-out.",
    ),
    Command(
        "promote", "coreach.release.registry:promote_command", toward_person=True,
        about="field a gate-passed version: it becomes @fielded, what robots fetch",
        usage="coreach [--json] promote NAME VERSION",
        help="Points the alias @fielded of registered model NAME at VERSION, after checking that the version "
             "passed the release gate and that its bundle verifies and is the one registered; the fielding "
             "history keeps the previous version for coreach rollback. Robots pick it up with coreach-robot "
             "fetch NAME. See the versions with coreach bundles.",
    ),
    Command(
        "rollback", "coreach.release.registry:rollback_command", toward_person=True,
        about="field the version that was fielded before the current one again",
        usage="coreach [--json] rollback NAME",
        help="Moves the alias @fielded of registered model NAME back to the version fielded before the current "
             "one (from the fielding history that coreach promote keeps), after the same checks as promote. "
             "Robots pick it up with their next coreach-robot fetch NAME.",
    ),
    Command(
        "bundles", "coreach.release.registry:bundles_command",
        about="list the registered versions: aliases, gate results, bundle status (changes nothing)",
        usage="coreach [--json] bundles [NAME]",
        help="One row per registered version of NAME (or of every model): its aliases (@fielded, "
             "@gate-passed), whether it passed the release gate and its key figures, and whether its bundle "
             "is in the store and, if cached here, still verifies. It only reads; if a release was interrupted "
             "half-way it says so and points to coreach finish-releases.",
    ),
    Command(
        "finish-releases", "coreach.release.registry:finish_releases_command",
        about="finish or roll back releases an interrupted process left half-published, saying what it did",
        usage="coreach finish-releases [--leftovers]",
        help="A release killed while publishing leaves an intent (its release run, tagged pending). For each "
             "one whose process is gone: if its version had been made usable the publish is finished (aliases "
             "and tags completed), otherwise everything it wrote is removed (the model version, its bundle and "
             "staging folders, uploaded files, the release run). coreach release does this by itself before "
             "it starts. --leftovers also removes what older versions of coreach left without an intent: "
             "versions that never passed the gate, release runs left RUNNING, bundle folders of no released "
             "version; only what coreach made is touched.",
    ),
    Command(
        "fetch", "coreach.runtime.robot_cli:fetch_command", toward_person=True, prints_cautions=True,
        about="the robot computer's fetch: NAME[@ALIAS] from a tracking server, verified, then made current",
        usage="coreach [--json] fetch NAME[@ALIAS] [--server URL] [--cache DIR] [--timeout S]",
        help="Downloads the bundle of NAME@ALIAS (default @fielded) from the tracking server, verifies its files "
             "against the hashes the registry recorded at release, and only then makes it the current bundle "
             "of NAME in the cache; a bundle that does not verify is refused (exit 3) and the current one stays. "
             "Options: --server URL (default COREACH_TRACKING_URI, else MLFLOW_TRACKING_URI), --cache DIR "
             "(default COREACH_ROBOT_CACHE, else ~/.cache/coreach/bundles), --timeout S (per request, 10). "
             "The same as coreach-robot fetch, which a robot computer runs without torch.",
    ),
    Command(
        "test-drive", "coreach.testdrive.command:test_drive_command", toward_person=True, records_person=True,
        prints_cautions=True,
        about="drive a release bundle by hand on a local page (simulation only); drives saved as episodes",
        usage="coreach [--json] test-drive BUNDLE [--host H] [--port P] [--rate HZ] [--record-dir DIR] "
              "[--position-tol M] [--orientation-tol-deg DEG]",
        help="Verifies a release bundle (BUNDLE: releases/<name>/v<version>, <name>@<alias> or <name>/<version>) "
             "and serves a page on this computer where a person drives its runtime session with a stick or "
             "gamepad against a kinematic simulation of the arm; recorded drives are saved as episodes for "
             "coreach vet drives=[...] and coreach relabel-drives. Options: --host H (127.0.0.1), --port P "
             "(8765; 0 for any free port), --rate HZ (control rate, 50), --record-dir DIR (drives), "
             "--position-tol M (arrival position tolerance, 0.02) and --orientation-tol-deg DEG (15). Ctrl-C "
             "stops it.",
    ),
    Command(
        "study plan", "coreach.study.commands:plan_command", toward_person=True, records_person=True, study=True,
        prints_cautions=True,
        about="plan a within-subject user study: Williams-balanced order, pseudonymous codes, a frozen schedule",
        usage="coreach [--json] study plan NAME [--new-version] [--root DIR] [study.KEY=VALUE ...]",
        help="Composes the study NAME (conf/coreach_conf/study/NAME.yaml: conditions, tasks, trials, "
             "practice_trials, participants, codes, seed, pilot, upload_to_tracking; study.KEY=VALUE overrides "
             "it) and writes its frozen schedule, plan.json (owner-only), to ROOT/NAME/v<N>/: the condition "
             "order of each participant from a Williams design, the task order of each block shuffled with the "
             "seed, pseudonymous participant codes and the letters A, B, C... participants see in place of the "
             "conditions (the key is in the plan, for the experimenter). The same config again changes nothing; "
             "a changed config replaces the latest version while it has no sessions (ROOT/NAME/v<N>/sessions/"
             "<code>/), and once it has, is refused unless --new-version writes v<N+1>. Options: --new-version, "
             "--root DIR (default .coreach/studies). Bundle folders must exist; NAME@ALIAS and NAME/VERSION "
             "references are checked for their form only. Example: coreach study plan bedside_shelf "
             "study.participants=18.",
    ),
    Command(
        "study session", "coreach.study.session_command:session_command", toward_person=True, records_person=True,
        study=True, prints_cautions=True,
        about="serve one participant's session of a planned study on a local page (simulation only), resumable",
        usage="coreach [--json] study session NAME CODE [--version N] [--root DIR] [--host 127.0.0.1] [--port 8766] "
              "[--uri URI]",
        help="Opens participant CODE's session of the frozen plan of study NAME and serves it on a local page: the "
             "experimenter confirms that informed consent was recorded, then per condition block (shown only as "
             "its letter) the practice and measured trials on the simulated arm (a 3-2-1 countdown, the arm "
             "moves only while a trial runs, which ends on arrival or at the plan's trial_time_limit_s), the "
             "raw NASA-TLX and the liking question, and at the end the ranking of the letters. Every step is "
             "written to ROOT/NAME/v<N>/sessions/CODE/ (state.json, trials.csv, responses.json, drives/; owner-"
             "only); a reloaded page or a stopped server ends the running trial as incomplete and the session "
             "goes on with the next step. Bundles are verified, and one released with looser gate settings is "
             "refused unless the plan is a pilot; one server per participant. No address or browser detail is "
             "stored. Options: --version N (default the latest), --root DIR (default .coreach/studies), --host "
             "(default 127.0.0.1), --port (default 8766; 0 any free port), --uri URI (the tracking store that "
             "resolves NAME@ALIAS bundle references). --json prints {url, participant, version, cautions} and "
             "serves until Ctrl-C or SIGTERM. Example: coreach study session bedside_shelf P01-7Q3K.",
    ),
    Command(
        "study analyze", "coreach.study.commands:analyze_command", toward_person=True, records_person=True,
        study=True, prints_cautions=True,
        about="paired statistics of a study's trials: Friedman, Wilcoxon with Holm, mixed model, GEE; HTML report",
        usage="coreach [--json] study analyze NAME [--trials PATH ...] [--version N] [--root DIR] [--out DIR] "
              "[--reference CONDITION] [--bootstrap N] [--uri URI]",
        help="Reads the study's long-format trial table (columns participant, condition, task, trial, success, "
             "time_s; optional tlx_mental, tlx_physical, tlx_temporal, tlx_performance, tlx_effort, "
             "tlx_frustration on a 0-100 scale and preference, a rank with 1 the most preferred) and writes "
             "per-condition and per-task summaries, the Friedman test with pairwise Wilcoxon signed-rank tests "
             "(Holm-corrected) and paired effect sizes with 95% intervals, a mixed model of completion time "
             "(random intercept per participant) and a GEE of success (binomial, exchangeable), as CSV tables "
             "and a self-contained report.html. A row or file that cannot be read is named in a warning and "
             "left out. Options: --trials PATH (a CSV file or a folder of them, repeatable; default every "
             "sessions/*/trials.csv of the study), --version N (default the latest), --root DIR (default "
             ".coreach/studies), --out DIR (default the version's analysis/), --reference CONDITION (the "
             "models' baseline; default direct), --bootstrap N (resamples for the rank-biserial interval, "
             "2000), --uri URI (the tracking store; default COREACH_TRACKING_URI, else MLFLOW_TRACKING_URI, else "
             "./mlflow.db). Only with upload_to_tracking: true in the plan, aggregates (never participant rows) "
             "are logged to MLflow. Example: coreach study analyze bedside_shelf --trials trials/.",
    ),
    Command(
        "study simulate", "coreach.study.commands:simulate_command", toward_person=True, study=True,
        prints_cautions=True,
        about="run the frozen plan with simulated participants through the session code, then the analysis",
        usage="coreach [--json] study simulate NAME [--participants N] [--fresh] [--rate HZ] [--version N] "
              "[--root DIR] [--uri URI]",
        help="Runs every participant of the latest plan (or the first N) as a simulated operator drawn from the "
             "study's population (beta, noise, tremor, reaction delay), headless, through the same session "
             "code a person's session runs: consent, practice, trials on the conditions' own Sessions (the "
             "bundle's runtime session; direct and blend as Sessions on the first bundle's arm, limits and "
             "scene), TLX, liking and ranking (answered by a plain invented model), written after every step. "
             "Then the analysis. Everything goes to <study>/v<N>/simulation/, apart from real sessions. A "
             "check of the protocol, its timing and its analysis before anyone is recruited; no robot moves. "
             "Options: --participants N, --fresh (start the simulation over), --rate HZ (control rate; default "
             "the plan's simulate_rate_hz, 10), --version N, --root DIR, --uri URI (to resolve NAME@ALIAS "
             "bundles). A killed run resumes where it stopped; the trial it was in is marked incomplete.",
    ),
    Command(
        "study withdraw", "coreach.study.commands:withdraw_command", toward_person=True, records_person=True,
        study=True, prints_cautions=True,
        about="delete one participant's recordings, answers and derived rows everywhere; rebuild the analyses",
        usage="coreach [--json] study withdraw NAME CODE [--root DIR]",
        help="Removes CODE's session folders (recorded drives, questionnaire answers, state, trial table) from "
             "every version of study NAME and every export holding them, rebuilds each analysis from the "
             "participants who remain, and records the code as withdrawn (the code and the time only) so it is "
             "never used for a new session. Refused while a session of CODE is running. Killed part-way, "
             "running it again finishes the job. Copies outside the study folder must be deleted by hand.",
    ),
    Command(
        "study export", "coreach.study.commands:export_command", toward_person=True, records_person=True,
        study=True, prints_cautions=True,
        about="a sharable copy of a study version: trials and answers as numbers, no free text, no times",
        usage="coreach [--json] study export NAME [--version N] [--root DIR] [--out DIR] [--drives]",
        help="Writes the plan, one trial table of every session, the questionnaire answers (TLX subscales, "
             "liking, ranking) and the analysis tables to OUT (default <study>/v<N>/exports/export-v<N>; an "
             "existing folder is refused), leaving out comments (free text) and every date and time. "
             "--drives adds the recorded drives. Pseudonymous codes stay; share the copy only as the ethics "
             "approval and data-protection rules allow.",
    ),
    Command(
        "study power", "coreach.study.power_command:power_command", toward_person=True, study=True,
        prints_cautions=True,
        about="coverage of the study analysis' intervals and power by simulation, from planted condition effects",
        usage="coreach [--json] study power NAME [--studies R] [--participants 6,12,18,...] [--seed S] "
              "[--version N] [--root DIR] [--out DIR] [study.planted.KEY=VALUE ...]",
        help="Simulates studies with the frozen plan's conditions, tasks and trials from the population in the "
             "study config's planted section (participant intercepts, normal completion times, logistic "
             "success, a fixed effect per condition and task; the shipped numbers are invented), analyses "
             "each with the same mixed model and GEE as coreach study analyze and writes, under "
             "ROOT/NAME/v<N>/power/ (owner-only): coverage.csv (share of studies whose 95% interval holds the "
             "true effect, with a Wilson interval), power.csv and power.png (share of studies rejecting at "
             "alpha 0.05 for planted.power: time of first minus second, with the mixed model and with "
             "Wilcoxon and Holm, per participant count) and power.html. No person's data is used. Options: "
             "--studies R (per coverage run and per participant count, 200), --participants N,N,... (default "
             "1 to 5 times the Williams design's sequence count), --seed S (default the plan's), --version N, "
             "--root DIR, --out DIR, study.planted.KEY=VALUE overrides. Example: coreach study power "
             "bedside_shelf study.planted.power.time_s=-3.",
    ),
    Command(
        "bench train", "coreach.bench.train_bench:run", config="bench_train", show="coreach.commands.summaries:show_bench",
        about="training throughput: Lightning against a bare PyTorch loop; the cVAE with and without a regulariser",
        usage=f"coreach bench train {_HYDRA}",
        help="Times the same training in Lightning and in a bare PyTorch loop (target: Lightning at >= 0.9 of "
             "the bare loop), and the cVAE with and without bench.regulariser (default goal_entropy; target: "
             "<= 2x the time), side by side in one run. Options: bench.epochs, bench.rounds, bench.regulariser, "
             "bench.threads (1 on shared cores).",
    ),
    Command(
        "bench sweep", "coreach.bench.sweep_bench:run", config="bench_sweep", show="coreach.commands.summaries:show_bench",
        about="a 12-run sweep serially and on 2 joblib workers: parallel efficiency (target >= 0.8)",
        usage=f"coreach bench sweep {_HYDRA}",
        help="Runs the same training sweep serially and on joblib workers and reports the parallel efficiency "
             "against what the machine's cores offer right now. Options: bench.runs (12), bench.workers (2), "
             "bench.threads_per_run (1), bench.train (each run's overrides), bench.tracking, "
             "bench.target_efficiency (0.8); other overrides apply to every run.",
    ),
    Command(
        "bench runtime", "coreach.bench.runtime_command:run", config="bench_runtime",
        show="coreach.commands.summaries:show_bench",
        about="per-step latency of a bundle's runtime session against a bare onnxruntime call",
        usage=f"coreach bench runtime bundle=<folder>|<name>@<alias> {_HYDRA}",
        help="Steps a bundle's runtime session (kinematics, belief, context, decoder, safety filter) and times "
             "each step against a bare onnxruntime call of the same decoder (target: p99 <= 300 us). Options: "
             "bundle= (required: a folder, NAME@ALIAS or NAME/VERSION), steps= (5000), warmup= (200), dt= (0.01).",
    ),
    Command(
        "bench vet", "coreach.bench.vet_bench:run", config="bench_vet", show="coreach.commands.summaries:show_bench",
        about="closed-loop throughput: batched loop against a per-episode loop and a bare decoder pass",
        usage=f"coreach bench vet {_HYDRA}",
        help="Times the batched vetting loop against a per-episode loop and against a bare batched decoder "
             "pass, each ratio against its target (targets.*). Options: run= (an MLflow run id, "
             "models:/<name>/<version> or a decoder folder; default an untrained cVAE), suite= (goal-switch), episodes= (per switch cell, 250), horizon_s=, "
             "candidates_per_axis=, per_episode=.",
    ),
    Command(
        "bench fuzz", "coreach.bench.fuzz_bench:run", config="bench_fuzz", show="coreach.commands.summaries:show_bench",
        about="the runtime session driven with wild sticks near every scene body, each step checked with coal",
        usage=f"coreach bench fuzz [bundle=<folder>|<name>@<alias>] {_HYDRA}",
        help="Drives a runtime session with wild sticks from start states near every body of the scene and "
             "checks each step with coal on the URDF's collision geometry (target: 0 penetrations, 0 keep-out "
             "entries); needs pinocchio. Options: bundle= (empty: a random decoder on scenario=), steps= "
             "(1000000), episode_steps=, seed=, dt=, workspace_min=, workspace_max=.",
    ),
)}


def find(name: str) -> Command | None:
    return COMMANDS.get(name)


def groups(table: dict[str, Command] | None = None) -> dict[str, list[Command]]:
    """Commands named "GROUP SUB" by group ("bench" -> bench train, bench sweep, ...)."""
    out: dict[str, list[Command]] = {}
    for cmd in (COMMANDS if table is None else table).values():
        if " " in cmd.name:
            out.setdefault(cmd.name.split(" ", 1)[0], []).append(cmd)
    return out


def load_target(spec: str):
    """The function a "module:function" entry names (imported only when its command runs)."""
    module, func = spec.split(":")
    return getattr(importlib.import_module(module), func)
