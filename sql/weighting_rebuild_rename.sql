-- Rebuild an older `weights` table without its primary key, step 3: the copy takes its name.
alter table __wavebook_weights_rebuilt rename to weights
