-- Connection settings: wavebook draws its own progress lines (pipeline.progress).
set enable_progress_bar = false
