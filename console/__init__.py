"""The command layer: the ``grainwright`` console command, its sub-commands and the demo (top of the house)."""

# The last line of ``grainwright --help`` and of the help of the commands whose output people look at
# (denoise, compare): the caution the README, the report and every exported model carry, in one line.
HELP_CAUTION = ("Caution: on medical or safety-critical images the output is a viewing and screening aid, not a "
                "substitute for the original or for qualified review.")
