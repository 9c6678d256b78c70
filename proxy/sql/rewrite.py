"""Plan -> backend SQL, and the sensitivity of each measure of the plan.

Everything here is a pure function of the plan and its table policy; the SQL is built as a
sqlglot tree and written once for PostgreSQL. Policy and analyst text (sources, columns,
filters) only ever enter as tree nodes; fixed fragments of this module's own, holding nothing
but its aliases and integers, are parsed into trees with sqlglot.

The backend query returns exactly one row per declared cell, in domain order: the key ordinals
``i0, i1, ...``, one column per measure ``m0, m1, ...`` (0 for empty cells), and for tables with
individuals each bound's value ``b0, b1, ...`` then each bound's clipped-away total (the same on
every row). It never returns rows of the table, never sorts, limits or filters on aggregates
(the one ORDER BY ... LIMIT 1 ranks the bounds' noisy scores: that is the mechanism itself).

Row tables (each row is one individual)
---------------------------------------
Every summed value is clamped to its declared range on the column's own type, then counted in
units of the column's step: per row (``round(clamp(x, lo, hi) / step)``) for inexact types, or
once per cell (``floor(SUM(clamp(x, lo, hi)) / step + 0.5)``) for numeric columns, whose sums are
exact (see ``_in_column_units``). The clamp is ``CASE WHEN x < lo THEN lo WHEN x > hi THEN hi
ELSE x END`` so that NULL stays NULL and adds nothing to a SUM (LEAST/GREATEST ignore NULL
arguments, so ``GREATEST(NULL, lo)`` would count every NULL as ``lo``); NaN sorts above every
number in PostgreSQL and clamps to ``hi``. Rows whose keys fall
outside the declared domains are aggregated into groups that are then dropped by joining the
finished aggregate to the domain list. Adding or removing one row changes one cell by at most 1
for a count and by at most ``M = max(|lo|, |hi|) / step`` for a sum, so the L1 sensitivity of the
whole histogram is 1 (count) or M (sum), whatever the number of cells.

Filtered measures and bounded values (``Measure.value``)
-------------------------------------------------------
``<aggregate> FILTER (WHERE c)`` (``Measure.where``) counts or sums, per row, ``CASE WHEN c THEN
v END`` instead of ``v``, v already clamped (COUNT(*) counts ``CASE WHEN c THEN 1 END``); ``c``
is checked and rebuilt as a WHERE
condition, so it cannot fail on any row. It is a different measure, with the same sensitivity
as the unfiltered one: what one row adds to it is either what it adds unfiltered or nothing
(NULL adds nothing to SUM or COUNT), so a row still moves one cell by at most 1 (counts) or M
(sums, clamped as before), and an individual's partials in each cell are at most its
unfiltered ones in absolute value, so every per-individual argument below holds unchanged.
COUNT(DISTINCT individual) FILTER counts an individual in a cell when one of its rows there
passes ``c``: a subset of the cells it touches, still at most min(R, cells). A filtered sum has
a bound of its own (its totals are of its own partials), never one computed from another
measure's totals.

SUM and AVG also take a per-row value whose range is fixed by the text: a boolean column cast to
integer (0 or 1) or a CASE of integer literals over checked conditions (range: smallest to
largest branch). The analyser gives it a derived integer column with that range, and it is
clamped and counted like any integer column: M = max(|lo|, |hi|).

Averages: a centred sum, and the epsilon split
-----------------------------------------------
AVG(x) is post-processing of two noisy measures of a cell, a sum and ``n``, the count of x's
values. Where the sum's noise comes from the declared range (row tables and declared bounds;
``centres_averages``) the sum is centred on the range's middle ``c = (lo + hi) / 2``: the
measure is ``sum(2 x - lo - hi)`` in half steps (an integer, exact: with x clamped to
[lo, hi] in steps, ``2 x - lo - hi`` lies in [lo - hi, hi - lo]), and the engine reports
``c + (noisy centred sum / 2) / noisy n``, which is the plain average when there is no noise.

Sensitivity. Row tables: one row moves the centred sum by at most ``hi - lo`` half steps, i.e.
``(hi - lo) / 2`` in the column's units, against ``max(|lo|, |hi|)`` for the plain sum (half
of it for a range starting at 0). For numeric columns summed exactly per cell, the cell's sum
S in steps is ``floor(total / step + 0.5)``: adding one row of clamped value y in [lo, hi]
moves S by an integer in [lo, hi] (monotone, commutes with integer shifts), so ``2 S - (lo +
hi) n`` moves by at most ``hi - lo``. Individuals: a partial ``p = 2 S - (lo + hi) n`` of one
(individual, cell) has ``|p| <= (hi - lo) n <= (hi - lo) r`` (r its rows there); the factor w
includes the rows bound R, so its kept L1 total (4b) is at most ``w (hi - lo) n_rows <= R (hi
- lo)``: the centred sum's sensitivity is ``R * (hi - lo)`` half steps, with no bound of its
own (``Rewritten.measure_multiples``).

Where bounds are chosen per query the sum is not centred: a chosen bound follows the
individuals' own totals, and centring makes those larger wherever the values sit in the low
part of the range. Measured on the demo (3,000 households x 365 daily readings, litres in
[0, 2000]): households' totals of litres have median 103,384 and 90th percentile 192,351 L;
of litres - 1000, 261,616 and 316,085 L, and |average - c| is 686 L against an average of 314
L, so centring would make AVG's error about 1.8 times larger there. When the query also asks
SUM(x), AVG reuses the plain sum SUM needs: one measure fewer leaves each measure more epsilon
(SUM(x) keeps its epsilon / 2 rather than / 3), and the average's error is comparable.

The split. With noise of scale Delta / epsilon (variance about 2 Delta^2 / epsilon^2), the
average's error is about ``(Z_s - (a - c) Z_n) / n``, of variance proportional to ``Delta_s^2 /
e_s^2 + (a - c)^2 Delta_n^2 / e_n^2``; for ``e_s + e_n`` fixed, Lagrange gives the optimum
``e_s : e_n = Delta_s^(2/3) : (|a - c| Delta_n)^(2/3)``. The average a is what the query asks,
so the split uses what holds for any data: ``|a - c| <= h``, with h = (hi - lo) / 2 centred, and
max(|lo|, |hi|) (with c = 0) plain; the error's largest variance over a is then minimised by
``e_s : e_n = Delta_s^(2/3) : (h Delta_n)^(2/3)``. In each case ``Delta_s = h Delta_n`` (row
tables: h and 1; individuals: R h and R, or at the ceilings most_rows * max(|lo|, |hi|) and
most_rows), so the minimax split is even: the engine's equal share per measure is it.

Tables with individuals (``[individual]`` with ``most_rows``)
-------------------------------------------------------------
Neighbouring databases differ by all the rows of one individual (in every table of its
population). An individual may own many rows in many cells, so its influence is bounded over
the whole answer at once (Amin, Kulesza, Munoz Medina & Vassilvitskii 2019, "Bounding User
Contributions"), never cell by cell. The backend query:

1. ``q``: aggregates per (individual, cell) inside the declared domains: ``r`` rows, and per
   measure its partial in measure units (a row count, a count of values, the clamped sum in
   step units, or 1 for COUNT(DISTINCT individual)). Rows whose individual is NULL belong to no
   identifiable individual and are not counted (no bound could be enforced on their owner).
   Where an enforced unique key (note 8) has all its columns but the individual's among the
   keys as written (``GROUP BY reading_date`` under the key (household_id, reading_date)), two
   rows of one (individual, cell) agree on every column of the key, by the key's own equality
   (GROUP BY's), so they are one row: each partial is computed on its row without grouping
   (``_over_one_row``: COUNT(*) is 1, COUNT(e) is 1 or 0, SUM(e) and MAX(e) are e), the value
   the aggregate has over that one-row group. The partials, and all that follows, are the same.
2. ``t``: per individual, its totals over all cells: ``n_rows``, the cells it touches, and per
   summed column the L1 total of its partials ``tot_j = sum |partial|``.
3. ``b``: the bounds, one per subject (``rows`` when the plan counts anything, and one per
   summed column), each either declared (its ceiling: ``most_rows`` rows, or
   ``most_rows * max(|lo|, |hi|)`` step units) or chosen per query (below).
4. ``w``: one factor per individual, ``w = min(1, B_j / total_j over its bounds j)``, scales all
   its partials, each rounded toward zero: ``trunc(p * w) = sign(p) * min(|p|, floor(|p| B_j /
   total_j), ...)``, computed with integer division (the floor of a minimum is the minimum of
   the floors), so it is exact. AVG's sum and count shrink by the same factor.
5. sums per cell (each of the two parts below summed per cell on its own, then added),
   joined to the list of declared cells (empty cells read 0); per bound the
   clipped-away total (see 7). An individual whose totals are all within its bounds has
   ``w = 1`` and keeps every partial as it is (the rounding of 4 gives ``f(N_i) - f(N_{i-1}) =
   p_i`` when f is the identity, with or without the half) and loses nothing; only the others
   (``s``: a total above its bound, or NULL, when all its partials of a sum are NULL) are
   scaled, and only their partials sorted for the running totals. So each cell's sum of kept
   partials is computed as the sum of all its partials as they are plus, over the scaled
   individuals' partials, ``kept - raw`` (a partial and its kept share are NULL together, and
   SUM skips both), and the clipped-away totals are summed over the scaled individuals alone
   (the others' terms are 0): the same numbers, with the sort and the divisions confined to
   the individuals a bound scales. Where each (individual, cell) is one row (1) and every sum
   is in whole steps (9: turning a sum into steps once per cell then gives the sum of the
   per-row conversions), the partials' cell sums are the row query's cells over the rows with
   an individual, which convert once per cell.

Sensitivity, given the bounds. Take neighbours D and D' = D minus individual u. Every other
individual's partials, totals and factor are computed from its own rows only, so they are equal
in D and D'; the answers differ exactly by u's scaled partials. For a count measure, u's scaled
partials add up over all cells to at most ``sum floor(c * R / n_rows) <= R`` (its counts add up
to at most n_rows); for a sum, to at most ``sum |p| * T / tot <= T`` in L1. COUNT(DISTINCT
individual) counts u once in each cell it touches when it touches at most R cells, else
nowhere: at most ``min(R, cells)``. So the L1 sensitivity of the whole answer is R for counts,
T for sums and min(R, cells) for distinct individuals, whatever the number of cells; each is at
least 1 (a noise scale must be positive; any upper bound is sound). Row tables are the case
without a factor: one row moves one cell by at most 1 or M.

Joins (``proxy.sql.joins`` accepts them; ``Plan.joins`` lists the tables). The query reads
one derived table ``j`` (``_rows``) and everything above applies to its rows, with the
individual column the one the protected tables share. Why the same sensitivities hold:

- Same population, inner join on equality of the individual columns only. A joined row pairs
  a row of table A with a row of table B whose individual values are equal (NULL never
  equals), so it belongs to exactly one individual, the owner of both halves. Neighbours
  remove all rows of one individual u from every table of its population, hence D' = D minus
  u leaves every joined row of every other individual as it is and removes exactly u's joined
  rows. That is the premise of the argument above (others' partials, totals and factors equal
  in D and D'; the answers differ by u's scaled partials), so the sensitivities are R, T and
  min(R, cells) as before. u owns at most ``most_rows(A) * most_rows(B)`` joined rows (each
  of its rows in A meets at most its rows in B), so that product is the ceiling of R, and
  ``R * max(|lo|, |hi|)`` of T; a one-row-per-individual table (most_rows 1) keeps the other
  table's ceiling. As everywhere, an individual beyond the data owner's ceiling is still
  bounded by the factor w: only the clipped-away figure's cap relies on the ceiling.
- Public lookup, joined on its declared key. Its rows describe nobody and do not change
  between neighbours. ``_joined_source`` keeps only key values that occur once in it, so each
  row of the protected tables meets at most one public row: the join maps each joined row of
  the protected tables to at most one row, with the same owner. Removing u removes exactly
  u's rows again, and nobody owns more rows than before (a row table stays at one row per
  individual: sensitivity 1 or M per row as above).
- Semi-join ``individual IN (SELECT individual FROM B WHERE c)``, written as EXISTS over B's
  rows with the same individual value. Whether a row of v passes depends only on v's own rows
  in B; removing u changes no other individual's rows or their passing, and removes u's.
The tables' populations are checked to be one (else the join would pair rows of different
individuals, and removing one could change many others' rows); the ledger then charges every
protected table read and their population's cap once.

Choosing a bound privately (the same scan). The candidates are a geometric grid below the
ceiling (``ceiling * (4/5)^k``, at least 1). For candidate k, ``above_k`` is the number of
individuals whose total exceeds it; all ``above_k`` come from one histogram of the totals over
the candidates (width_bucket, one pass over ``t``). The chosen candidate maximises
``score_k + z_k`` with ``score_k = -|above_k - A|`` (ties to the smallest k), where the target A
(individuals left above, from the number of cells and the measures' epsilon) and the noise z_k
come from the engine in a setting. This is "report noisy max" with exact discrete Laplace noise
of scale ``2 * Delta / epsilon_b``, where ``Delta = 1`` bounds how far one individual moves any
score (it changes each above_k by at most 1; A does not depend on the data), and the engine may
add a public, data-independent preference ``-c_k`` to z_k. It is epsilon_b-DP:

  Proof. Fix the noise of every candidate but i. Candidate i wins iff ``z_i >= t(D)``, where the
  integer threshold t(D) is set by the other noisy scores and by score_i (ties broken by a fixed
  order, so the winning set of z_i is an upper set of integers). Moving from D to D' changes
  each score by at most Delta, so ``t(D') <= t(D) + 2 Delta``. For discrete Laplace noise with
  ``P(z) ~ a^|z|``, ``a = exp(-epsilon_b / (2 Delta))``, every tail satisfies
  ``P(z >= m + 1) >= a * P(z >= m)`` (for m >= 0 with equality; for m < 0 because
  ``(1 - a) P(z >= m + 1) >= C a >= C a^(|m| + 1) = a P(z = m)``, C the normalising constant).
  Hence ``P(i | D') >= P(z_i >= t(D) + 2 Delta) >= a^(2 Delta) P(i | D) = exp(-epsilon_b)
  P(i | D)``; integrating over the other candidates' noise and swapping D, D' gives the claim.

Why not sample the exponential mechanism directly: its probabilities need the scores, which
the proxy only has after the scan, and then the scaling with the chosen bound would need a
second scan. Report noisy max with noise drawn before the query (exact integer sampling, see
``proxy.noise``) lets the backend make the choice inside the one query, with integer arithmetic.

6. Composition. A query with chosen bounds spends: epsilon_b per chosen bound on its choice,
   epsilon_c per bound on its clipped-away figure, and epsilon_m per measure on the measures
   (noise scaled to the sensitivities at the chosen bounds, which are released and public).
   By basic adaptive sequential composition the query is (sum of these)-DP; the engine's split
   makes that sum the query's epsilon. A percentile plan releases no clipped-away figure (the
   backend's is dropped unread), so it spends no epsilon_c and its measures get that share.

7. How far clipping may have lowered an answer. Per bound j, ``clipped_j`` sums over
   individuals their clipped-away amount (rows, or the L1 of the sum's partials, lost to the
   factor and the rounding), each capped at ``cap_j = max(terms) + 1``
   (``loss_terms``): ``ceiling_j - B_j`` (w set by bound j: at most the ceiling less the bound),
   ``ceiling_j - per_row * R`` for a sum bound when the rows bound R set w (each row adds at most
   per_row), and ``ceiling_j`` for any other binding bound; ``ROUNDING_LOSS = 1`` covers the
   rounding, which loses under one unit per individual in all (4b), whatever the cells. An
   individual whose partials of a sum are all NULL has a NULL amount for that sum; it lost
   nothing (its partials and kept shares are NULL together and add nothing to any cell), so it
   counts 0, not the cap ``LEAST(NULL, cap)`` would give. Removing u moves ``clipped_j`` by at
   most ``cap_j``, its sensitivity. The caps rely on the data owner's ceiling (most_rows): an
   individual breaking it is still bounded in the answer, but its clipped-away amount may then
   be understated.

Spread (VARIANCE, STDDEV and their forms)
-----------------------------------------
Three measures: the count of values, ``centred_sum = sum(v - c)`` and ``centred_squares =
sum((v - c)^2)``, where v is a row's clamped value in step units (integers clamped, numbers
clamped then rounded to the step, so each term is an exact integer) and ``c = floor((lo +
hi) / 2)`` the range's centre in step units. Centring changes nothing the engine computes (the
variance ``(Q - S^2 / C) / (C - 1)`` is the same for any shift) but shrinks the sensitivities:
one row moves the centred sum by at most ``F = max(c - lo, hi - c)`` (about half of
``max(|lo|, |hi|)`` when the range starts at 0) and the sum of squares by at most ``F^2``
(instead of ``max(lo^2, hi^2)``). Row tables: those are the L1 sensitivities over all cells (one
row is in one cell). Tables with individuals: the centred measures belong to the rows bound R.
Their partials are scaled by the individual's factor ``w <= R / n_rows`` (rounded toward zero,
signs kept), so u's scaled centred sum adds up over all cells, in L1, to at most ``w * n_rows *
F <= R * F``, and its scaled squares to at most ``R * F^2``: the sensitivities are R times the
row's ``measure_multiples``. The chosen bound of rows, its clipped-away figure and the
composition are as above (the centred measures add nothing to a bound's subject).

Percentiles (histograms)
------------------------
A percentile plan adds one innermost key, ``floor(x / step) * step`` over the column's declared
range (narrowed by WHERE), and its one measure is ``count_values(x)``: the backend returns per
cell a histogram of the values in step buckets, never a value. Its L1 sensitivity over all
cells and buckets is that of a count: 1 on row tables, R with individuals. There, rounding each
(individual, cell, bucket) count toward zero would erase an individual's histogram (its counts
are mostly 0 or 1, and ``trunc(1 * w) = 0`` for any factor below 1), so a histogram is scaled by
cumulative rounding about the middle instead: with ``N_i`` the individual's running count over
its (cell, bucket) partials in ordinal order, partial i keeps ``floor(w N_i + 1/2) -
floor(w N_{i-1} + 1/2)``, computed as exact integer divisions (``_scaled`` with ``half``:
``floor(min(x, x B / T) + 1/2)`` is the minimum of ``x`` and ``div(2 x B + T, 2 T)``), and
``floor(w x + 1/2)`` is monotone in x, so each kept count is >= 0 and at most its raw count. The
kept counts telescope to ``floor(w n + 1/2) <= R`` over all cells and buckets (``w n <= R`` and
R is an integer), so the sensitivity is R as for any count. The half matters for which values
are kept: an individual thinned to k values keeps those at ranks about ``(j - 1/2) n / k`` of
its own, evenly spread (k = 1: its middle value), where plain floors would keep its top ones
(k = 1: its largest value) and push every percentile up. Every
other individual's kept counts come from its own rows only. The engine never releases the histogram: it selects each percentile by the
exponential mechanism, whose utility moves by at most the histogram's change in that cell; the
argument is in ``proxy.selection``. Values outside the declared range, like keys outside their
domains, fall in no bucket and are not ranked.

8. Few rows per individual, held by the database. The backend may enforce a unique key that
   contains the individual column (``unique_keys``: a PRIMARY KEY, UNIQUE constraint or unique
   index, valid, immediate, non-partial, on plain columns with their types' default btree
   equality and own collations, of an ordinary table without inheritance children, as
   ``proxy.backend`` reads it from the catalog; never the data owner's word; Spark reports
   none). Take such a key U = {individual, c_1, ..., c_k} where every c_i is the column of a
   GROUP BY key of the plan, or kept in its declared domain (10), and has a type taking only
   its declared values inside its declared domain (``countable_keys``: date for dates,
   smallint, integer or bigint for integers, text or character varying for categories,
   boolean). Every counted row lies in the cells, so its c_i lies in c_i's declared domain
   narrowed by the WHERE literals on c_i (``within``; for a kept column, ``keys.narrowings``
   of the WHERE): a key over c_i maps every other value to no cell (a key as written joins the
   declared values; a bucket is NULL outside the domain, ``proxy.sql.keys``), a kept column's
   other values are not counted (10), and a row failing a WHERE conjunct is not counted. Call
   D_i that narrowed domain. Two rows of one individual agree on the
   individual column, so they differ in some c_i by the key's equality, and two values equal
   to one declared value are equal to each other (the guards and joins compare with that
   equality or with the finer equality of their text): an individual has at most ``K =
   prod |D_i|`` counted rows (K = 1 for a key of the individual column alone). FILTER and the
   WHERE only remove rows.

   When K <= most_rows and no bound of the plan is chosen (all declared: always so for
   most_rows = 1), and the plan reads one table without a percentile histogram, the
   per-individual steps are skipped: the query is the row tables' one over the rows whose
   individual is not NULL (as in 1), with each declared bound's value and a clipped-away total
   of 0 appended, so that the engine reads, noises and states the same things as on the
   per-individual path.

   Same measures. In step 2 every individual has ``n_rows <= K <= most_rows = R``, and for a
   sum ``tot = sum over cells |partial| <= n_rows * M <= T`` (each partial of n rows lies in
   [n lo, n hi] in step units: the rounding to steps is monotone and commutes with integer
   shifts; T = most_rows * max(1, |lo|, |hi|)); the centred measures have no bound of their
   own. So ``w = 1`` and every partial is kept whole (the cumulative rounding of 4 keeps
   ``f(N_i) - f(N_{i-1}) = p_i`` when f is the identity, with or without the half): the cells
   equal the row query's counts and sums over the same rows, nothing is clipped (the declared
   clipped figure is never noised or shown), and COUNT(DISTINCT individual) counts each
   individual in every cell holding one of its rows (its per-individual test ``touched <= R``
   holds, touched <= n_rows). One difference: a numeric column's clamped values are turned
   into step units once per cell here, not once per (individual, cell): closer to the exact
   sum, and equal wherever the values are multiples of the step (numeric(7, 1) litres in steps
   of 0.1).
   A chosen bound takes the per-individual path: it could fall below an individual's total and
   clip (and chosen bounds usually lie below K, so the key would seldom help there).

   Same noise. Neighbours differ by one individual's rows, at most K of them counted, so the
   answer moves by at most K <= R (counts), at most ``min(K, cells) <= min(R, cells)``
   (distinct individuals) and, for a sum, in each cell c by at most ``n_c M`` (the cell's
   rounding to steps is monotone and commutes with integer shifts, and n_c M is an integer),
   in all at most ``n_rows M <= K M <= T``. The noise stays scaled to the declared
   sensitivities R, T, min(R, cells) and R times a centred measure's multiple (each of u's
   rows moves a centred measure by at most the multiple), which are at least these: the stated
   sensitivity is unchanged and still an upper bound; but for the numeric rounding above, the
   answer's distribution is the per-individual path's.
   The key is read when a table is first planned and again after a policy reload; a constraint
   dropped on a running proxy needs a reload (as any change of a source's columns does).

9. Whole steps. A sum of a column whose backend type is numeric(p, s) with 10^-s a whole
   number of the column's steps (``whole_step_columns``, the scale read from the catalog), of an
   integer column, of a bounded value, or of a column rounded to steps per row
   (``_sums_in_whole_steps``) is a whole number of steps: ``floor(x / step + 0.5)`` is exact,
   so turning it into steps once per cell or once per (individual, cell) gives the same
   integers, and the one-row partials of 1 may take their cell sums from the row query.
   Not done, on purpose: running the row query of 8 only when a count made by the query itself
   finds no counted row outside a key column's declared domain (e.g. the date of a
   whole-table query). The answer would be the same function of the data, but the branch,
   and so the answer's time (2x at 10M rows), would turn on a single row that a WHERE can pick
   out: a timing channel on one individual, against the bound on one row's work the limits
   keep (``proxy.sql.filters``). Note 10 gets the same speed without any count: such rows are
   never counted, whatever the data.

10. Key columns kept in their declared domains. With declared bounds on one table, every column
   c of an enforced unique key U with the individual (``unique_keys``, as in 8: its other
   columns are policy columns of a type taking only their declared values) that the plan does
   not group by is *kept* (``_kept_in_domains``): a row whose c is NULL or outside c's declared
   domain (``keys.inside_domain``, the guard of every bucket key) is not counted, by the row
   query and the per-individual query alike (``_counted``, next to the WHERE and the
   individual's NOT NULL, before any partial, total or cell). A grouped column needs nothing:
   a key counts only rows inside its column's domain (8). So each c_i of U but the individual
   is held to its declared domain narrowed by the WHERE literals on it, and 8 bounds each
   individual to K = prod |D_i| counted rows: where K <= most_rows the row query runs, else the
   per-individual query, over the same rows either way.

   Proof that it is one function of the data. The rows counted are fixed by the plan, the
   declared bounds and the catalog's keys alone, and are the same on both paths: the kept
   columns do not depend on K (which WHERE literals move) nor on the data. Over those rows
   and with K <= most_rows, 8 shows that the row query's cells, bound values and clipped-away
   totals are the per-individual query's (equal integers where every sum is in whole steps,
   9; else the rounding to steps once per cell, 8). So with the noise off the answer is one
   function of the data whichever path runs; the path itself, and with it the time, is chosen
   from the query text, the policy and the catalog only, never from a count (9), and a row
   outside the domain costs one per-row comparison on either path, as a row failing the WHERE.

   Sensitivity. The kept condition is a per-row condition like the WHERE: removing an
   individual u removes exactly u's counted rows and changes no other row's passing, so
   notes 1 to 8 hold over the counted rows unchanged (R, T, min(R, cells) on the per-individual
   path; at most K <= R rows moved on the row path, 8).

   Why such rows are dropped rather than counted. Counting them would break K (a household's
   readings on days outside the declared year are not bounded by the key), and the policy
   declares that the column takes those values only, as it does for a grouped key, whose rows
   outside the domain are not counted either. Chosen bounds, joins and tables without such a
   key are unchanged: they take the per-individual path, which bounds every individual by its
   factor, so keeping would change what they count for no speed. The answer's notes and
   EXPLAIN name each kept column. A WHERE literal on a kept column moves K, and so the path:
   a prepared statement's slot on such a column is planned per value (``proxy.sql.statement``),
   never bound late into a plan made for another value.

11. One row per individual (``wide_cells``). A backend that runs each step of the query above
   as stages of its own, each costing a fixed tenth of a second or more however few its rows
   (Spark), asks for the same steps over one row per individual when the cells are few
   (``_wide_individual_query``): ``q`` groups the counted rows by (individual, cell ordinal),
   with the partials of step 1; the ordinal is computed per row from each key's value (computed
   once, ``hushql_key<j>``) by the joins' own match (``_key_matches``) against the declared
   values, in domain order, NULL outside the domains; ``p`` makes each individual's partials
   columns, ``r_c`` (0 where it has no row in cell c) and ``m<n>_c`` (NULL there), and leaves
   out the NULL cell and the individuals with no row in any cell; ``t`` adds its totals
   (``n_rows``, ``touched``, ``tot_j``: NULL when every partial of the sum is NULL, as SUM over
   no value gives) and, per cell in ordinal order, its running sizes; ``b`` is chosen as in 3,
   from the same histogram of t's totals; ``w``
   keeps each partial's share by ``_kept``, the same expression over the same values; ``a``
   sums the kept shares per cell and each individual's clipped-away amount, capped as in 7.

   Same answer. Every individual's partials, totals, running sizes (the same order of cells)
   and factor are the joined shape's, and a missing partial (NULL, or a count of 0) adds
   nothing to a total, a running size, a kept share, a cell or a clipped amount, as the
   joined shape's missing row adds nothing there; an individual within its bounds keeps every
   partial and loses 0 in both. So the rows, and with them the sensitivities of 3, the choice
   of 3, the composition of 6 and the caps of 7, are the joined shape's
   (``tests/test_wide_shape.py`` compares the two on PostgreSQL, ``tests/test_spark.py`` Spark's
   wide rows with PostgreSQL's joined ones). Where the query is skipped for the row query
   (8) or its cells hold one row each (1), the joined shape runs: those need no grouping.
"""

from __future__ import annotations

import datetime as dt
import itertools
import re
from dataclasses import dataclass, replace
from decimal import Decimal
from fractions import Fraction
from typing import Sequence

import sqlglot
import sqlglot.expressions as exp

from proxy.policy import ColumnPolicy, TablePolicy
from proxy.sql.domains import cell_count, key_size, key_values
from proxy.sql.vocabulary import clamp_node, column_node, number_node, value_node
from proxy.sql.keys import inside_domain, key_expression, narrowings
from proxy.sql.plan import GroupKey, Measure, Plan

# Backend session settings holding, per chosen bound j, the comma-separated integer noise of
# each candidate's score (drawn exactly by the engine before the query runs).
BOUND_NOISE_SETTING = "hushql.bound_noise_{}"

# The alias of the derived table a join reads through (``_rows``); other backends look for it.
JOINED_ROWS_ALIAS = "j"

# The column holding each row's cell ordinal in the one-row-per-individual shape (notes 11).
WIDE_CELL_COLUMN = "hushql_cell"
WIDE_KEY_PREFIX = "hushql_key"  # + j: key j's value, computed once per row

# Candidates for a chosen bound: the ceiling times (4/5)^k, k = 0..MOST_CANDIDATES-1 (at least 1).
_CANDIDATE_RATIO = Fraction(4, 5)
MOST_CANDIDATES = 40


@dataclass(frozen=True)
class Bound:
    """One contribution bound of a query over a table with individuals, in measure units.

    ``subject`` is "rows" (an individual's rows over all cells) or a summed column (the L1 total
    of its clamped values over all cells, in step units). ``candidates`` (ascending) are the
    values a private quantile chooses among; empty when the ceiling is declared as the bound.
    ``loss_cap`` is each individual's cap in the clipped-away figure: its sensitivity is
    ``loss_cap(value)``.
    """

    subject: str
    ceiling: int
    per_row: int  # most one row adds to the subject's total (1 for rows): ceiling = most_rows * per_row
    candidates: tuple[int, ...]

    @property
    def chosen(self) -> bool:
        return bool(self.candidates)


# One individual moves each candidate's score -|above_k - A| by at most this.
SCORE_SENSITIVITY = 1

# What rounding may take from one individual on top of its factor, in measure units: the
# rounding is cumulative over its cells (module notes, 4), so it loses under one unit in all.
ROUNDING_LOSS = 1

# Measures whose partials may be negative: their size is the partial's absolute value, and the
# kept share takes the partial's sign.
_SIGNED_KINDS = ("sum", "midpoint_sum", "centred_sum")


# A term of a loss cap: constant - coefficient * (value of bound ``index``), or the constant.
LossTerm = tuple[int, int, "int | None"]


def loss_terms(bounds: tuple[Bound, ...], j: int) -> list[LossTerm]:
    """The cap on one individual's clipped-away amount for bound j is the largest of these
    terms plus 1 (module notes, 7)."""
    own = bounds[j]
    terms: list[LossTerm] = [(own.ceiling, 1, j)]
    for k, other in enumerate(bounds):
        if k == j:
            continue
        if other.subject == "rows" and own.subject != "rows":
            terms.append((own.ceiling, own.per_row, k))  # per_row * (most_rows - R)
        else:
            terms.append((own.ceiling, 0, None))
    return terms


def loss_cap(bounds: tuple[Bound, ...], j: int, values: tuple[int, ...]) -> int:
    """The sensitivity of bound j's clipped-away total, given the bounds' values."""
    return max(c - a * (values[k] if k is not None else 0)
               for c, a, k in loss_terms(bounds, j)) + ROUNDING_LOSS



@dataclass(frozen=True)
class Rewritten:
    """The backend SQL of a plan and what the engine needs to noise its result.

    The backend returns one row per cell: key ordinals, then one column per measure, then (for
    tables with individuals) for each bound its value and its clipped-away total. Sensitivities
    depend on the bounds' values: ``sensitivities(values)``.
    """

    sql: str
    cells: int
    bounds: tuple[Bound, ...]
    measure_bounds: tuple[int, ...]  # per measure, index into bounds (-1 on row tables)
    row_sensitivities: tuple[int, ...]  # per measure, on row tables
    measure_kinds: tuple[str, ...] = ()
    # per measure, what one row adds at most, in units of its bound (1 but for the centred
    # measures, which are bounded through the rows bound: module notes, "Spread" and "Averages")
    measure_multiples: tuple[int, ...] = ()
    buckets: int = 1  # candidates per cell of a percentile plan's histogram (``cells`` counts them)
    # An enforced unique key (its columns) holds each individual to at most ``held_rows``
    # counted rows, within the declared bounds: the query does not scale, the declared bounds
    # hold of themselves (module notes, 8). Empty and 0 otherwise.
    held_by: tuple[str, ...] = ()
    held_rows: int = 0
    # Columns of such keys the query does not group by, whose rows outside the declared values
    # (NULL included) are not counted, on either path (module notes, 10). Empty otherwise.
    kept_in_domains: tuple[str, ...] = ()

    def sensitivities(self, values: tuple[int, ...] = ()) -> tuple[int, ...]:
        """The L1 sensitivity of each measure given the bounds' values (module notes, 3)."""
        if not self.bounds:
            return self.row_sensitivities
        multiples = self.measure_multiples or tuple(1 for _ in self.measure_kinds)
        return tuple(max(1, min(values[b], self.cells) if kind == "count_individuals"
                         else values[b] * multiple)
                     for b, kind, multiple in zip(self.measure_bounds, self.measure_kinds, multiples))

    @property
    def declared_sensitivities(self) -> tuple[int, ...]:
        """Sensitivities at the ceilings (what a chosen bound can never exceed)."""
        return self.sensitivities(tuple(b.ceiling for b in self.bounds))


def rewrite(plan: Plan, exact_columns: frozenset[str] = frozenset(),
            unique_keys: frozenset[frozenset[str]] = frozenset(),
            whole_steps: frozenset[str] = frozenset(), wide_cells: int = 0) -> Rewritten:
    """Build the backend query and sensitivities of an analysed plan. Pure.

    ``exact_columns`` names number columns whose backend type is exact (numeric): their clamped
    values are summed exactly and turned into step units once per cell (row tables) or once per
    (individual, cell) partial, instead of per row. ``unique_keys`` are the column sets the
    backend itself keeps unique in the source (enforced constraints only, ``countable_keys``):
    when one holds each individual within the declared bounds, the per-individual steps are
    skipped (module notes, 8). ``whole_steps`` names exact columns whose type holds only
    multiples of the column's step (``whole_step_columns``, notes 9). ``wide_cells``: up to
    this many cells, the per-individual steps run with one row per individual (notes 11), the
    shape a backend that plans each step as a stage of its own runs fastest (0: never).
    """
    policy = plan.table
    buckets = 1
    if plan.ranked is not None:  # a percentile plan: its histogram is the innermost key
        buckets = key_size(_key_column(policy, plan.ranked), plan.ranked)
        plan = replace(plan, keys=plan.keys + (plan.ranked,), ranked=None)
    cells = cell_count([key_size(_key_column(policy, k), k) for k in plan.keys])
    kinds = tuple(m.kind for m in plan.measures)
    if cells == 0:  # the WHERE leaves some key no value: no cell, nothing to read or to noise
        return Rewritten(sql=_no_cells(plan).sql(dialect="postgres"), cells=0, bounds=(),
                         measure_bounds=tuple(-1 for _ in plan.measures),
                         row_sensitivities=tuple(1 for _ in plan.measures), measure_kinds=kinds,
                         buckets=buckets)
    if policy.individual is None:
        tree = _row_table_query(plan, exact_columns)
        return Rewritten(sql=tree.sql(dialect="postgres"), cells=cells, bounds=(),
                         measure_bounds=tuple(-1 for _ in plan.measures),
                         row_sensitivities=tuple(_unit_sensitivity(policy, m) for m in plan.measures),
                         measure_kinds=kinds, buckets=buckets)
    bounds, measure_bounds = _bounds(plan, cells)
    declared = not any(b.chosen for b in bounds) and not plan.joins  # one table, declared bounds
    kept = _kept_in_domains(plan, unique_keys) if declared else ()
    held = _holding_key(plan, unique_keys, kept) if declared and buckets == 1 else None
    one_row_cells = _cells_hold_one_row(plan, unique_keys)
    if held is not None:  # (no percentile histogram)
        tree = _one_row_each_query(plan, bounds, exact_columns, kept)
    elif cells <= wide_cells and not one_row_cells:
        tree = _wide_individual_query(plan, bounds, measure_bounds, exact_columns, cells,
                                      middle=buckets > 1, kept=kept)
    else:
        tree = _individual_table_query(plan, bounds, measure_bounds, exact_columns,
                                       middle=buckets > 1,
                                       one_row_cells=one_row_cells,
                                       whole=_sums_in_whole_steps(plan, exact_columns, whole_steps),
                                       kept=kept)
    return Rewritten(sql=tree.sql(dialect="postgres"), cells=cells, bounds=bounds,
                     measure_bounds=measure_bounds, row_sensitivities=(), measure_kinds=kinds,
                     measure_multiples=tuple(_row_multiple(policy, m) for m in plan.measures),
                     buckets=buckets, held_by=held[0] if held else (),
                     held_rows=held[1] if held else 0, kept_in_domains=kept)


# Backend types (``format_type``) that take, inside a column's declared domain, only the
# declared values, per column kind (module notes, 8).
_DISCRETE_TYPES = {"date": ("date",), "integer": ("smallint", "integer", "bigint"),
                   "category": ("text", "character varying"), "boolean": ("boolean",)}


def countable_keys(policy: TablePolicy, keys: frozenset[frozenset[str]],
                   types: dict[str, str]) -> frozenset[frozenset[str]]:
    """The enforced unique keys of a table's source that may bound its individuals' rows
    (module notes, 8): those holding the individual column whose other columns are policy
    columns of a type taking only the declared values inside the declared domain."""
    if policy.individual is None:
        return frozenset()
    individual = policy.individual.column

    def discrete(name: str) -> bool:
        column = policy.columns.get(name)
        found = types.get(name, "")
        return column is not None and any(
            found == kind or found.startswith(f"{kind}(")
            for kind in _DISCRETE_TYPES.get(column.kind, ()))

    return frozenset(key for key in keys
                     if individual in key and all(discrete(c) for c in key - {individual}))


def _key_sizes(plan: Plan, unique_keys: frozenset[frozenset[str]]
               ) -> list[tuple[int, tuple[str, ...], tuple[str, ...]]]:
    """Per enforced unique key holding the individual column: K, the product over its other
    columns of their declared domains narrowed by the WHERE literals on them (a grouped
    column's key carries them; ``keys.narrowings`` reads them for the others), its columns, and
    those of its other columns that are not grouped by (module notes, 8 and 10)."""
    assert plan.table.individual is not None
    individual = plan.table.individual.column
    keyed = {key.column: key.within for key in plan.keys}
    written = narrowings(plan.where, plan.table)
    found = []
    for key in unique_keys:
        if individual not in key:
            continue
        others = sorted(key - {individual})
        size = cell_count([key_size(plan.table.columns[c], GroupKey(
            c, within=keyed[c] if c in keyed else written.get(c))) for c in others])
        found.append((size, (individual, *others), tuple(c for c in others if c not in keyed)))
    return found


def _kept_in_domains(plan: Plan, unique_keys: frozenset[frozenset[str]]) -> tuple[str, ...]:
    """The columns whose rows outside the declared values are not counted, on either path,
    when bounds are declared (module notes, 10): every column of an enforced unique key with
    the individual that the plan does not group by. Sorted; decided from the plan and keys."""
    return tuple(sorted({c for _, _, unchecked in _key_sizes(plan, unique_keys) for c in unchecked}))


def _holding_key(plan: Plan, unique_keys: frozenset[frozenset[str]], kept: tuple[str, ...]
                 ) -> tuple[tuple[str, ...], int] | None:
    """An enforced unique key holding each individual to K <= most_rows counted rows, with K
    (module notes, 8 and 10): every other column of the key is grouped by or kept in its
    declared domain, and K is the product of their declared domains narrowed by the WHERE; the
    smallest K (then the first columns), None when no key holds."""
    assert plan.table.individual is not None
    found = [(size, columns) for size, columns, unchecked in _key_sizes(plan, unique_keys)
             if set(unchecked) <= set(kept)]
    if not found:
        return None
    size, columns = min(found)
    return (columns, size) if size <= plan.table.individual.most_rows else None


def _sums_in_whole_steps(plan: Plan, exact: frozenset[str], whole_steps: frozenset[str]) -> bool:
    """Whether every sum of the plan turns into step units without rounding, so that turning
    it once per cell or once per (individual, cell) gives the same integers (module notes, 9):
    integer columns and bounded values, inexact columns (rounded per row), and exact columns
    whose type holds only multiples of the step."""
    for measure in plan.measures:
        if measure.kind in ("sum", "midpoint_sum"):  # a bounded value's column is an integer
            column = plan.table.columns[measure.column]  # type: ignore[index]
            name: str = measure.column  # type: ignore[assignment]
            if _in_column_units(column, name, exact) and name not in whole_steps:
                return False
    return True


def whole_step_columns(policy: TablePolicy, types: dict[str, str]) -> frozenset[str]:
    """The number columns whose backend type is numeric(p, s) with 10^-s a whole number of the
    column's step: every value, and every sum of values, is then a whole number of steps."""
    found = set()
    for name, kind in types.items():
        column = policy.columns.get(name)
        match = re.fullmatch(r"numeric\(\d+,\s*(\d+)\)", kind)
        if column is None or column.kind != "number" or match is None:
            continue
        ratio = Decimal(1).scaleb(-int(match.group(1))) / column.unit
        if ratio == ratio.to_integral_value() and ratio >= 1:
            found.add(name)
    return frozenset(found)


def centres_averages(policy: TablePolicy) -> bool:
    """Whether AVG(x) is computed from a centred sum (module notes, "Averages"): yes when the
    sums' sensitivities come from the declared ranges (row tables, declared bounds), no when
    bounds are chosen per query from the data's own totals."""
    individual = policy.individual
    return individual is None or individual.bounds != "chosen" or individual.most_rows <= 1


def centred_width(column: ColumnPolicy) -> int:
    """The most one value moves a centred sum, in its units (half steps): ``hi - lo`` in steps,
    at least 1."""
    low, high = _unit_range(column)
    return max(1, high - low)



def _no_cells(plan: Plan) -> exp.Select:
    """A query of the answer's shape (ordinals, then measures) returning no row."""
    columns = [f"i{j}" for j in range(len(plan.keys))] + [f"m{n}" for n in range(len(plan.measures))]
    return exp.Select().select(*[exp.alias_(number_node(0), name, copy=False) for name in columns],
                               copy=False).where(exp.false(), copy=False)


def _bounds(plan: Plan, cells: int) -> tuple[tuple[Bound, ...], tuple[int, ...]]:
    """The bounds a plan needs (rows for any count, one per summed column) and, per measure,
    which bound limits it."""
    policy = plan.table
    assert policy.individual is not None
    most_rows = policy.individual.most_rows
    subjects: list[str] = []
    for m in plan.measures:
        subject = m.column if m.kind == "sum" else "rows"
        if subject not in subjects:
            subjects.append(subject)  # type: ignore[arg-type]
    choose = policy.individual.bounds == "chosen" and most_rows > 1
    bounds = []
    for subject in subjects:
        if subject == "rows":
            ceiling = most_rows
        else:
            low, high = _unit_range(policy.columns[subject])
            ceiling = most_rows * max(1, abs(low), abs(high))
        bounds.append(Bound(subject=subject, ceiling=ceiling, per_row=ceiling // most_rows,
                            candidates=_candidates(ceiling) if choose else ()))
    measure_bounds = tuple(subjects.index(m.column if m.kind == "sum" else "rows")  # type: ignore[arg-type]
                           for m in plan.measures)
    return tuple(bounds), measure_bounds


def _candidates(ceiling: int) -> tuple[int, ...]:
    """A geometric grid below the ceiling: floor(ceiling * (4/5)^k), at least 1, ascending."""
    found = {max(1, int(ceiling * _CANDIDATE_RATIO ** k)) for k in range(MOST_CANDIDATES)}
    return tuple(sorted(found))


def _unit_sensitivity(policy: TablePolicy, measure: Measure) -> int:
    """Largest change of a row table's measure (L1 over cells) from one row, at least 1: a sum
    over a column declared as [0, 0] cannot move, but noise needs a positive scale."""
    if measure.kind == "count_individuals":
        raise ValueError("COUNT(DISTINCT individual) needs an [individual] section")
    if measure.kind in ("count_rows", "count_values"):
        return 1
    if measure.kind in CENTRED or measure.kind == "midpoint_sum":
        return _row_multiple(policy, measure)
    low, high = _unit_range(policy.columns[measure.column])  # type: ignore[index]
    return max(1, max(abs(low), abs(high)))


# Measures of the clamped values less the range's centre (module notes, "Spread").
CENTRED = ("centred_sum", "centred_squares")


def centre(column: ColumnPolicy) -> int:
    """The centre c of a summable column's range in step units: floor((lo + hi) / 2)."""
    low, high = _unit_range(column)
    return (low + high) // 2


def _row_multiple(policy: TablePolicy, measure: Measure) -> int:
    """What one row adds at most to a centred measure (|x - c| or (x - c)^2 in step units, or
    |2x - lo - hi| in half steps for AVG's midpoint sum), at least 1; 1 for the other measures
    (their bound is in their own units)."""
    if measure.kind == "midpoint_sum":
        return centred_width(policy.columns[measure.column])  # type: ignore[index]
    if measure.kind not in CENTRED:
        return 1
    column = policy.columns[measure.column]  # type: ignore[index]
    low, high = _unit_range(column)
    farthest = max(centre(column) - low, high - centre(column))
    return max(1, farthest if measure.kind == "centred_sum" else farthest * farthest)


def _centred_value(policy: TablePolicy, name: str) -> exp.Expression:
    """One row's clamped value in step units less the centre, exactly (NULL stays NULL): the
    integer column clamped (bigint), or the number column clamped and rounded to its step
    (numeric)."""
    column = policy.columns[name]
    low, high = _unit_range(column)
    if column.kind == "integer":  # bigint: |x - c|^2 of a clamped 32-bit integer fits 63 bits
        units = exp.cast(_clamp(column_node(name), low, high), "bigint", copy=False)
    else:
        units = exp.cast(exp.Anonymous(this="round", expressions=[exp.Div(
            this=clamp_node(column_node(name), number_node(column.low), number_node(column.high)),
            expression=number_node(column.unit), typed=True)]), "numeric", copy=False)
    return exp.Paren(this=exp.Sub(this=units, expression=number_node(centre(column))))


def _unit_range(column: ColumnPolicy) -> tuple[int, int]:
    """The declared range of a summable column in integer units of its step."""
    unit = column.unit
    low, high = (Decimal(v) / unit for v in column.range)  # type: ignore[union-attr]
    if low != low.to_integral_value() or high != high.to_integral_value():
        raise ValueError("range bounds must be multiples of the step")
    return int(low), int(high)


# ---- building blocks -------------------------------------------------------------------------

def _clamp(value: exp.Expression, low: int, high: int) -> exp.Expression:
    """``value`` clamped to [low, high] on its own type, NULL kept as NULL (see the module notes)."""
    return clamp_node(value, number_node(low), number_node(high))


def _key_column(policy: TablePolicy, key: GroupKey) -> ColumnPolicy:
    return policy.columns[key.column]


def _key_expression(policy: TablePolicy, key: GroupKey) -> exp.Expression:
    """The per-row value a key groups by: the column, or its guarded bucket (NULL outside the
    declared domain, matching no cell); a CASE key gives its label's ordinal (``keys``)."""
    if key.form == "column":
        return column_node(key.column)
    return key_expression(key, policy.columns[key.column], ordinals=True)


def _in_column_units(column: ColumnPolicy, name: str, exact: frozenset[str]) -> bool:
    """Whether sums of this number column are kept in its own units until the cell is done.

    For an exact backend type (numeric) the clamped values add up exactly, so the conversion to
    step units, ``floor(total / step + 0.5)``, runs once per cell instead of a division per row.
    It keeps the sensitivity: floor(x + 0.5) is monotone and commutes with integer shifts, so
    totals differing by at most an integer number D of steps convert to integers at most D apart.
    Inexact types (double precision) are rounded to steps per row, so their sums are integers.
    """
    return column.kind == "number" and name in exact


def _row_value(policy: TablePolicy, measure: Measure, exact: frozenset[str]) -> exp.Expression:
    """What one row contributes to a sum: clamped on the column's own type first (so nothing
    after it can overflow), then, unless summed in column units, rounded to step units; NULL
    for a row its FILTER condition does not pass."""
    column = policy.columns[measure.column]  # type: ignore[index]
    low, high = _unit_range(column)
    if column.kind == "integer":
        return _filtered_row(measure, _clamp(_measured(measure), low, high))
    clamped = clamp_node(_measured(measure), number_node(column.low), number_node(column.high))
    if _in_column_units(column, measure.column, exact):  # type: ignore[arg-type]
        return _filtered_row(measure, clamped)
    # round() by name: sqlglot's Round node would add a per-row cast to double precision;
    # typed=True keeps PostgreSQL's own division (no cast).
    return _filtered_row(measure, exp.Anonymous(this="round", expressions=[
        exp.Div(this=clamped, expression=number_node(column.unit), typed=True)]))


def _measured(measure: Measure) -> exp.Expression:
    """What a measure counts or sums per row: its column, or its checked per-row value (a
    bounded value, ``Measure.value``)."""
    return measure.value.copy() if measure.value is not None else column_node(measure.column)  # type: ignore[arg-type]


def _filtered_row(measure: Measure, value: exp.Expression) -> exp.Expression:
    """``value`` where the measure's FILTER condition holds, NULL elsewhere (adds nothing)."""
    if measure.where is None:
        return value
    return exp.Case(ifs=[exp.If(this=measure.where.copy(), true=value)])


def _to_units(total: exp.Expression, column: ColumnPolicy) -> exp.Expression:
    """floor(total / step + 0.5): a finished sum in column units as an integer of steps."""
    ratio = exp.Div(this=total, expression=number_node(column.unit), typed=True)
    return exp.Anonymous(this="floor", expressions=[exp.Add(this=ratio, expression=number_node("0.5"))])


def _aggregate(policy: TablePolicy, measure: Measure, exact: frozenset[str],
               finish: bool = True) -> exp.Expression:
    """The row-level aggregate computing ``measure`` over one group of rows; with ``finish``
    False a sum kept in column units is left unconverted (per-individual partials)."""
    if measure.kind == "count_rows":
        return exp.Count(this=exp.Star() if measure.where is None
                         else _filtered_row(measure, number_node(1)))
    if measure.kind == "count_values":
        return exp.Count(this=_filtered_row(measure, _measured(measure)))
    if measure.kind == "centred_sum":
        return exp.Sum(this=_centred_value(policy, measure.column))  # type: ignore[arg-type]
    if measure.kind == "centred_squares":
        value = _centred_value(policy, measure.column)  # type: ignore[arg-type]
        return exp.Sum(this=exp.Mul(this=value, expression=value.copy()))
    if measure.kind == "count_individuals":  # tables with individuals only (module notes, 8)
        assert policy.individual is not None
        return exp.Count(this=exp.Distinct(expressions=[
            _filtered_row(measure, column_node(policy.individual.column))]))
    if measure.kind == "sum":
        total: exp.Expression = exp.Sum(this=_row_value(policy, measure, exact))
        column = policy.columns[measure.column]  # type: ignore[index]
        if finish and _in_column_units(column, measure.column, exact):  # type: ignore[arg-type]
            total = _to_units(total, column)
        return total
    if measure.kind == "midpoint_sum":
        # 2 S - (lo + hi) n in half steps: S the finished clamped sum in steps, n the values.
        low, high = _unit_range(policy.columns[measure.column])  # type: ignore[index]
        # The same rows, value and FILTER as the plain sum and count of this measure.
        doubled = exp.Mul(this=number_node(2), expression=exp.paren(
            _aggregate(policy, replace(measure, kind="sum"), exact), copy=False))
        middle = exp.Mul(this=number_node(low + high),
                         expression=exp.Count(this=_filtered_row(measure, _measured(measure))))
        return exp.Sub(this=doubled, expression=middle)
    raise AssertionError(measure.kind)


def _domain_source(policy: TablePolicy, key: GroupKey, index: int,
                   listed: bool = False) -> exp.Expression:
    """A FROM item ``d<index>(i, v)`` listing a key's values with ordinals (a CASE key's values
    are its label ordinals), as a VALUES list when ``listed``; must hold: the key has at least
    one value."""
    column = _key_column(policy, key)
    alias = exp.TableAlias(this=exp.to_identifier(f"d{index}"),
                           columns=[exp.to_identifier("i"), exp.to_identifier("v")])
    values = key_values(column, key)
    first = values[0]
    if not listed and len(values) > 1 and isinstance(first, (int, dt.date)) \
            and not isinstance(first, bool) and _consecutive(values):
        # Consecutive integers or days: v = first + i over generate_series(0, n - 1), rather
        # than a VALUES list of every value (date + integer is a date in PostgreSQL).
        series = exp.Anonymous(this="generate_series", expressions=[number_node(0), number_node(len(values) - 1)])
        inner = exp.Select().select(
            exp.column("i"), exp.alias_(exp.Add(this=value_node(first), expression=exp.column("i")),
                                         "v", copy=False), copy=False).from_(
            exp.Table(this=series, alias=exp.TableAlias(this=exp.to_identifier("s"),
                                                          columns=[exp.to_identifier("i")])), copy=False)
        return exp.Subquery(this=inner, alias=alias)
    rows = [exp.Tuple(expressions=[number_node(i), number_node(i) if key.form == "case" else value_node(v)])
            for i, v in enumerate(values)]
    return exp.Values(expressions=rows, alias=alias)


def _consecutive(values: Sequence[object]) -> bool:
    """Whether the values step by exactly one (integer or day) from first to last."""
    if isinstance(values, range):
        return values.step == 1
    step = 1 if isinstance(values[0], int) else dt.timedelta(days=1)
    return all(b - a == step for a, b in zip(values, values[1:]))  # type: ignore[operator]


def _key_matches(key: GroupKey, policy: TablePolicy, grouped: exp.Expression,
                 domain_value: exp.Expression) -> exp.Expression:
    """Join condition between a grouped key and a domain value; categories compare as text."""
    if key.form == "column" and _key_column(policy, key).kind == "category":
        grouped = exp.cast(grouped, "text", copy=False)
    return exp.EQ(this=grouped, expression=domain_value)


def _source(policy: TablePolicy) -> exp.Table:
    table = exp.to_table(policy.source, dialect="postgres")
    for part in ("this", "db", "catalog"):
        node = table.args.get(part)
        if isinstance(node, exp.Identifier):
            node.set("quoted", True)
    return table


def _rows(plan: Plan) -> exp.Expression:
    """The FROM item a plan reads: its table, or for a join one derived table ``j`` whose
    columns are named as in the plan (module notes, "Joins"). PostgreSQL pulls the derived
    table up into the query, so it costs nothing by itself."""
    if not plan.joins:
        return _source(plan.table)
    used = _used_columns(plan)
    provided: dict[str, exp.Expression] = {}  # the individual columns are one (equal when joined)
    for index, join in enumerate(plan.joins):
        for name, own in join.columns:
            if name in used or not provided:  # a derived table needs one column at least
                provided.setdefault(name, exp.alias_(column_node(own, f"t{index}"), exp.to_identifier(name, quoted=True),
                                                     copy=False))
    select = exp.Select().select(*provided.values(), copy=False)
    for index, join in enumerate(plan.joins):
        if join.kind == "semi":
            select = select.where(_semi_join(plan, index), copy=False)
            continue
        item = _joined_source(join.table, f"t{index}")
        if join.kind == "from":
            select = select.from_(item, copy=False)
        else:
            select = select.join(item, on=_join_condition(plan, index), join_type="inner", copy=False)
    return exp.Subquery(this=select, alias=exp.TableAlias(this=exp.to_identifier(JOINED_ROWS_ALIAS)))


def _used_columns(plan: Plan) -> set[str]:
    """The plan columns the query reads: keys, measures, the WHERE's and the individual's
    (only these are named in the derived table, so an unused listed column is never read)."""
    used = {key.column for key in plan.keys} | {m.column for m in plan.measures if m.column}
    if plan.where is not None:
        used |= {column.name for column in plan.where.find_all(exp.Column)}
    if plan.table.individual is not None:
        used.add(plan.table.individual.column)
    return used


def _joined_source(table: TablePolicy, alias: str) -> exp.Expression:
    """A joined table under ``alias``; a public table keeps only the rows whose key occurs
    once, so that no row of the protected tables meets two of its rows."""
    source = _source(table)
    if not table.public or table.key is None:
        return exp.alias_(source, alias, table=True, copy=False)
    key = column_node(table.key)
    once = exp.Select().select(key, copy=False).from_(_source(table), copy=False).group_by(
        key.copy(), copy=False).having(exp.EQ(this=exp.Count(this=exp.Star()), expression=number_node(1)),
                                       copy=False)
    rows = exp.Select().select(exp.Star(), copy=False).from_(source, copy=False).where(
        exp.In(this=key.copy(), query=exp.Subquery(this=once)), copy=False)
    return exp.Subquery(this=rows, alias=exp.TableAlias(this=exp.to_identifier(alias)))


def _join_condition(plan: Plan, index: int) -> exp.Expression:
    """``t<index>.column = t<to>.column`` of one join; categories compare as text."""
    join = plan.joins[index]
    assert join.column is not None and join.to is not None
    sides = [column_node(join.column, f"t{index}"), column_node(join.to[1], f"t{join.to[0]}")]
    if join.table.columns[join.column].kind == "category":
        sides = [exp.cast(side, "text", copy=False) for side in sides]
    return exp.EQ(this=sides[0], expression=sides[1])


def _semi_join(plan: Plan, index: int) -> exp.Expression:
    """EXISTS (a row of the semi-joined table for the same individual meeting its WHERE)."""
    join = plan.joins[index]
    alias = f"t{index}"
    condition: exp.Expression = _join_condition(plan, index)
    if join.where is not None:
        inner = join.where.transform(
            lambda node: exp.Column(this=node.this.copy(), table=exp.to_identifier(alias))
            if isinstance(node, exp.Column) and node.args.get("table") is None else node)
        condition = exp.and_(condition, exp.Paren(this=inner), copy=False)
    rows = exp.Select().select(number_node(1), copy=False).from_(
        exp.alias_(_source(join.table), alias, table=True, copy=False), copy=False).where(
        condition, copy=False)
    return exp.Exists(this=rows)


def _filtered(plan: Plan, select: exp.Select) -> exp.Select:
    select = select.from_(_rows(plan), copy=False)
    if plan.where is not None:
        select = select.where(plan.where.copy(), copy=False)
    return select


def _cells_frame(plan: Plan) -> exp.Select:
    """SELECT i0, v0, i1, v1, ... over every declared cell (a cross join of the domains)."""
    projections: list[exp.Expression] = []
    for j in range(len(plan.keys)):
        projections += [exp.alias_(exp.column("i", f"d{j}"), f"i{j}", copy=False),
                        exp.alias_(exp.column("v", f"d{j}"), f"v{j}", copy=False)]
    select = exp.Select().select(*projections, copy=False)
    for j, key in enumerate(plan.keys):
        source = _domain_source(plan.table, key, j)
        select = select.from_(source, copy=False) if j == 0 else select.join(source, join_type="cross", copy=False)
    return select


def _finish(plan: Plan, aggregate: exp.Select, by_ordinal: bool) -> exp.Select:
    """Left-join the finished aggregate ``a`` to all cells ``c``; empty cells read 0.

    ``by_ordinal``: ``a`` carries key ordinals i0.. to match; otherwise key values k0.., matched
    to the declared values (values outside the domains match no cell and drop out).
    Rows come back in domain order, one per cell.
    """
    policy = plan.table
    outer = exp.Select().select(*[exp.column(f"i{j}", "c") for j in range(len(plan.keys))],
                       *[exp.alias_(exp.Coalesce(this=exp.column(f"m{n}", "a"),
                                                 expressions=[number_node(0)]), f"m{n}", copy=False)
                         for n in range(len(plan.measures))], copy=False)
    outer = outer.from_(exp.Subquery(this=_cells_frame(plan),
                                     alias=exp.TableAlias(this=exp.to_identifier("c"))), copy=False)
    conditions = [
        exp.EQ(this=exp.column(f"i{j}", "a"), expression=exp.column(f"i{j}", "c")) if by_ordinal
        else _key_matches(key, policy, exp.column(f"k{j}", "a"), exp.column(f"v{j}", "c"))
        for j, key in enumerate(plan.keys)]
    outer = outer.join(exp.Subquery(this=aggregate, alias=exp.TableAlias(this=exp.to_identifier("a"))),
                       on=exp.and_(*conditions, copy=False), join_type="left", copy=False)
    return outer.order_by(*[exp.column(f"i{j}", "c") for j in range(len(plan.keys))], copy=False)


def _in_domains(plan: Plan, grouped: exp.Select, alias: str, listed: bool = False) -> exp.Select:
    """The rows of ``grouped`` (key columns k0..) whose keys lie in the declared domains, with
    their ordinals i0.. added; rows outside the domains drop out of the inner joins. ``listed``:
    the domains as VALUES lists, whose values the planner knows (joined to a whole table's
    rows, a computed series made PostgreSQL 15 hash the table, not the domain: measured)."""
    select = exp.Select().select(*[exp.column(p.alias_or_name, alias) for p in grouped.expressions], copy=False).from_(
        exp.Subquery(this=grouped, alias=exp.TableAlias(this=exp.to_identifier(alias))), copy=False)
    for j, key in enumerate(plan.keys):
        source = _domain_source(plan.table, key, j, listed)
        select = select.join(source, on=_key_matches(key, plan.table, exp.column(f"k{j}", alias),
                                                     exp.column("v", f"d{j}")), join_type="inner", copy=False)
        select = select.select(exp.alias_(exp.column("i", f"d{j}"), f"i{j}", copy=False), copy=False)
    return select


def _row_table_query(plan: Plan, exact: frozenset[str],
                     only: exp.Expression | None = None) -> exp.Select:
    """One aggregate over the (filtered) rows, per cell; ``only`` further limits the rows."""
    policy = plan.table
    measures = [exp.alias_(exp.Coalesce(this=_aggregate(policy, m, exact), expressions=[number_node(0)]),
                           f"m{n}", copy=False)
                for n, m in enumerate(plan.measures)]
    keys = [exp.alias_(_key_expression(policy, k), f"k{j}", copy=False) for j, k in enumerate(plan.keys)]
    select = _filtered(plan, exp.Select().select(*keys, *measures, copy=False))
    if only is not None:
        select = select.where(only, copy=False)
    if not plan.keys:
        return select
    grouped = select.group_by(*[number_node(j + 1) for j in range(len(keys))], copy=False)
    return _finish(plan, grouped, by_ordinal=False)


def _counted(plan: Plan, kept: tuple[str, ...]) -> exp.Expression:
    """Which rows a table with individuals counts beyond the WHERE: those with an individual
    (module notes, 1) and each ``kept`` column inside its declared domain (notes, 10)."""
    assert plan.table.individual is not None
    owned: exp.Expression = exp.Not(this=exp.Is(this=column_node(plan.table.individual.column),
                                                 expression=exp.Null()))
    inside = [inside_domain(name, plan.table.columns[name]) for name in kept]
    return exp.and_(owned, *inside, copy=False) if inside else owned


def _one_row_each_query(plan: Plan, bounds: tuple[Bound, ...], exact: frozenset[str],
                        kept: tuple[str, ...] = ()) -> exp.Select:
    """When the backend holds each individual within the declared bounds (module notes, 8 and
    10): the row query over the rows ``_counted`` keeps, then each declared bound's value and
    a clipped-away 0."""
    assert plan.table.individual is not None and not any(b.chosen for b in bounds)
    tail = [exp.alias_(number_node(b.ceiling), f"b{j}", copy=False) for j, b in enumerate(bounds)] + [
        exp.alias_(number_node(0), f"clipped{j}", copy=False) for j in range(len(bounds))]
    return _row_table_query(plan, exact, _counted(plan, kept)).select(*tail, copy=False)


def _select(text: str) -> exp.Select:
    """A fixed fragment of this module's own SQL (aliases and integers only, never policy or
    analyst text), parsed once into a tree to be combined with built parts."""
    tree = sqlglot.parse_one(text, dialect="postgres")
    assert isinstance(tree, exp.Select)
    return tree


def _expression(text: str) -> exp.Expression:
    """An expression fragment of this module's own (aliases and integers only)."""
    return sqlglot.parse_one(text, dialect="postgres")


def _partial(policy: TablePolicy, measure: Measure, exact: frozenset[str]) -> exp.Expression:
    """One measure's partial over the rows of one (individual, cell), as an exact number in
    measure units: COUNT for counts, the clamped sum in step units for sums, 1 for distinct
    individuals."""
    if measure.kind == "count_individuals":
        if measure.where is None:
            return number_node(1)
        # FILTER: 1 when one of the individual's rows in the cell passes the condition.
        return exp.Max(this=exp.Case(ifs=[exp.If(this=measure.where.copy(), true=number_node(1))],
                                     default=number_node(0)))
    if measure.kind in ("sum", "midpoint_sum"):
        return exp.cast(_aggregate(policy, measure, exact, finish=True), "numeric", copy=False)
    return _aggregate(policy, measure, exact)


def _scaled(value: str, bounds: tuple[Bound, ...], *, half: bool = False) -> str:
    """SQL for floor(value * w), value >= 0: w = min(1, B_j / total_j) over the plan's bounds,
    as integer divisions (floor of a minimum is the minimum of the floors), exact. With ``half``,
    floor(value * w + 1/2): ``div(2 value B_j + total_j, 2 total_j)`` (the value's own term
    is an integer, which the half leaves as it is)."""
    terms = [value]
    for j, bound in enumerate(bounds):
        total = _total(j, bound)
        # (the numerator in parentheses: Spark's DIV binds tighter than +)
        terms.append(f"div((2 * {value} * b.b{j} + t.{total}), NULLIF(2 * t.{total}, 0))" if half
                     else f"div({value} * b.b{j}, NULLIF(t.{total}, 0))")
    return f"LEAST({', '.join(terms)})"


def _within(bounds: tuple[Bound, ...]) -> str:
    """SQL true exactly when an individual's totals (``t``) are all within the bounds (``b``):
    its factor is 1; NULL when a total is NULL (all its partials of a sum are)."""
    return " AND ".join(f"t.{_total(j, bound)} <= b.b{j}" for j, bound in enumerate(bounds))


def _kept(value: str, running: str | None, bounds: tuple[Bound, ...], *,
          half: bool = False) -> str:
    """SQL for one partial's kept share, value >= 0 (module notes, 4): ``f(running) -
    f(running - value)`` with f = floor(x * w) (``half``: floor(x * w + 1/2), for histograms,
    module notes "Percentiles") and ``running`` the individual's running total up to and
    including this cell; just ``f(value)`` when each individual has one cell. Where w = 1
    (every total within its bound) that difference is ``value`` itself, so the divisions run
    only for the individuals a bound scales down."""
    if running is None:
        return _scaled(value, bounds, half=half)
    return (f"CASE WHEN {_within(bounds)} THEN {value} ELSE {_scaled(running, bounds, half=half)} - "
            f"{_scaled(f'({running} - {value})', bounds, half=half)} END")


def _over_one_row(aggregate: exp.Expression) -> exp.Expression:
    """The value of an aggregate expression over a group of exactly one row, computed on the
    row: COUNT(*) is 1, COUNT(e) is 1 where e is not NULL and else 0 (bigint, as COUNT), SUM(e)
    and MAX(e) are e (NULL stays NULL; a sum as numeric, which holds any SUM's value)."""
    def one(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Count):
            assert not isinstance(node.this, exp.Distinct)  # partials count no distinct values
            present = number_node(1) if isinstance(node.this, exp.Star) else exp.Case(
                ifs=[exp.If(this=exp.Not(this=exp.Is(this=node.this, expression=exp.Null())),
                            true=number_node(1))], default=number_node(0))
            return exp.cast(present, "bigint", copy=False)
        if isinstance(node, exp.Sum):
            return exp.cast(exp.paren(node.this, copy=False), "numeric", copy=False)
        if isinstance(node, exp.Max):
            return node.this
        return node

    return aggregate.transform(one, copy=True)


def _cells_hold_one_row(plan: Plan, unique_keys: frozenset[frozenset[str]]) -> bool:
    """Whether an enforced unique key holds each (individual, cell) of the plan to one row at
    most (module notes, 1): all its columns but the individual's are keys as written."""
    assert plan.table.individual is not None
    written = {key.column for key in plan.keys if key.form == "column"}
    individual = plan.table.individual.column
    return any(individual in key and key - {individual} <= written for key in unique_keys)


def _individual_table_query(plan: Plan, bounds: tuple[Bound, ...], measure_bounds: tuple[int, ...],
                            exact: frozenset[str], middle: bool = False,
                            one_row_cells: bool = False, whole: bool = False,
                            kept: tuple[str, ...] = ()) -> exp.Select:
    """The per-individual rewrite (module notes): partials per (individual, cell) in the
    domains (``middle``: a percentile plan's histogram, thinned about the middle), totals per
    individual, the bounds (declared, or chosen by noisy max over the
    candidates), one factor per individual scaling all its partials, sums per cell, and per
    bound the clipped-away total, each individual capped; over the rows ``_counted`` keeps
    (``kept``: columns held to their declared values, module notes 10)."""
    policy = plan.table
    assert policy.individual is not None
    counted = _counted(plan, kept)
    who = exp.alias_(column_node(policy.individual.column), "who", copy=False)
    keys = [exp.alias_(_key_expression(policy, k), f"k{j}", copy=False) for j, k in enumerate(plan.keys)]
    partials = [exp.alias_(exp.Count(this=exp.Star()), "r", copy=False)] + [
        exp.alias_(_partial(policy, m, exact), f"m{n}", copy=False)
        for n, m in enumerate(plan.measures)]
    if one_row_cells:  # each (individual, cell) holds one row at most (module notes, 1)
        partials = [_over_one_row(partial) for partial in partials]
    per_individual = _filtered(plan, exp.Select().select(who, *keys, *partials, copy=False)).where(
        counted, copy=False)
    if not one_row_cells:
        per_individual = per_individual.group_by(
            *[number_node(j + 1) for j in range(len(keys) + 1)], copy=False)
    q = _in_domains(plan, per_individual, "p", listed=one_row_cells) if plan.keys else per_individual
    sum_bounds = [(j, measure_bounds.index(j)) for j, b in enumerate(bounds) if b.subject != "rows"]
    totals = ["who", "SUM(r) AS n_rows", "COUNT(*) AS touched"] + [
        f"SUM(ABS(m{n})) AS tot{j}" for j, n in sum_bounds]
    t = _select(f"SELECT {', '.join(totals)} FROM q GROUP BY who")
    b = _select("SELECT " + ", ".join(
        f"({_choice_sql(j, bound)}) AS b{j}" if bound.chosen else f"{bound.ceiling} AS b{j}"
        for j, bound in enumerate(bounds)))
    rows_bound = next((j for j, bound in enumerate(bounds) if bound.subject == "rows"), None)
    ordinals = [f"q.i{j}" for j in range(len(plan.keys))]
    # Per scaled partial: its size (>= 0) and, with keys, its individual's running total in
    # cell order (module notes, 4); the running totals come from a window over q.
    sizes = {"r": "q.r"} | {f"m{n}": f"ABS(q.m{n})" if measure.kind in _SIGNED_KINDS else f"q.m{n}"
                            for n, measure in enumerate(plan.measures)
                            if measure.kind != "count_individuals"}
    window = (f"OVER (PARTITION BY q.who ORDER BY {', '.join(ordinals)} "
              "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)")
    running = {name: f"q.run_{name}" if plan.keys else None for name in sizes}
    scaled = [f"{_kept('q.r', running['r'], bounds, half=middle)} AS r_kept"]
    for n, measure in enumerate(plan.measures):
        if measure.kind == "count_individuals":
            scaled.append(f"CASE WHEN t.touched <= b.b{rows_bound} THEN q.m{n} ELSE 0 END AS m{n}")
        elif measure.kind in _SIGNED_KINDS:
            scaled.append(f"SIGN(q.m{n}) * ({_kept(sizes[f'm{n}'], running[f'm{n}'], bounds)})"
                          f" AS m{n}")
        else:
            scaled.append(f"{_kept(sizes[f'm{n}'], running[f'm{n}'], bounds, half=middle)} AS m{n}")
    # Only the individuals a bound may scale (``s``: factor below 1, or a NULL total) are
    # scaled, and only their partials sorted for running totals (module notes, 5).
    s = _select(f"SELECT t.* FROM t CROSS JOIN b WHERE NOT COALESCE({_within(bounds)}, FALSE)")
    source = "q"
    if plan.keys:
        columns = ["q.who", "q.r"] + ordinals + [f"q.m{n}" for n in range(len(plan.measures))]
        source = (f"(SELECT {', '.join(columns)}, "
                  + ", ".join(f"SUM({size}) {window} AS run_{name}" for name, size in sizes.items())
                  + " FROM q JOIN s ON s.who = q.who) AS q")
    w = _select(f"SELECT {', '.join(['q.who', 'q.r'] + ordinals + [f'q.m{n}' + f' AS raw{n}' for n in range(len(plan.measures))] + scaled)} "
                f"FROM {source} JOIN s AS t ON t.who = q.who CROSS JOIN b")
    losses = []
    for j, bound in enumerate(bounds):
        if bound.subject == "rows":
            losses.append(f"SUM(r - r_kept) AS lost{j}")
        else:
            n = measure_bounds.index(j)
            losses.append(f"SUM(ABS(raw{n}) - ABS(m{n})) AS lost{j}")
    lost = _select(f"SELECT {', '.join(losses)} FROM w GROUP BY who")
    caps = ", ".join(
        f"COALESCE(SUM(LEAST(COALESCE(lost{j}, 0), GREATEST({_loss_terms_sql(loss_terms(bounds, j))})"
        f" + {ROUNDING_LOSS})), 0) AS clipped{j}"
        for j, bound in enumerate(bounds))
    clipped = _select(f"SELECT {caps} FROM lost")
    # Per cell, every partial as it is, plus what scaling changed (kept - raw) of the scaled
    # ones: the sum of the kept partials (module notes, 5).
    ordinal_names = [f"i{j}" for j in range(len(plan.keys))]
    # Each side summed per cell first: where q is read again from the table (one-row cells),
    # its sum is then a parallel aggregate of its own rather than an Append of every row
    # (measured, day by day with chosen bounds at 10M rows: 9.2x -> 7.2x the plain query).
    def summed_side(alias: str, values: list[str]) -> str:
        columns = [f"{alias}.{i}" for i in ordinal_names] + [
            f"SUM({v}) AS m{n}" for n, v in enumerate(values)]
        grouped = f" GROUP BY {', '.join(f'{alias}.{i}' for i in ordinal_names)}" if ordinal_names else ""
        return f"SELECT {', '.join(columns)} FROM {alias}{grouped}"
    # One-row partials whose sums are in whole steps: the partials' cell sums are the row
    # query's cells (module notes, 5), which turn a numeric sum into steps once per cell, not
    # once per row.
    by_rows = one_row_cells and whole
    as_they_are = (f"SELECT {', '.join([f'qc.{i}' for i in ordinal_names] + [f'qc.m{n}' for n in range(len(plan.measures))])} FROM qc"
                   if by_rows else summed_side("q", [f"q.m{n}" for n in range(len(plan.measures))]))
    changes = (as_they_are + " UNION ALL "
               + summed_side("w", [f"w.m{n} - w.raw{n}" for n in range(len(plan.measures))]))
    measures = [f"COALESCE(SUM(u.m{n}), 0) AS m{n}" for n in range(len(plan.measures))]
    tail = [f"b.b{j}" for j in range(len(bounds))] + [f"clip.clipped{j}" for j in range(len(bounds))]
    if plan.keys:
        summed = _select(f"SELECT {', '.join([f'u.{i} AS {i}' for i in ordinal_names] + measures)} "
                         f"FROM ({changes}) AS u GROUP BY {', '.join(f'u.{i}' for i in ordinal_names)}")
        outer = _finish(plan, summed, by_ordinal=True)
        outer = outer.join(exp.to_table("b"), join_type="cross", copy=False).join(
            exp.to_table("clipped", alias="clip"), join_type="cross", copy=False)
        outer = outer.select(*[_expression(x) for x in tail], copy=False)
    else:
        outer = _select(f"SELECT {', '.join([f'a.m{n}' for n in range(len(plan.measures))] + tail)} "
                        f"FROM (SELECT {', '.join(measures)} FROM ({changes}) AS u) AS a CROSS JOIN b "
                        f"CROSS JOIN clipped AS clip")
    histograms = [(f"h{j}", _histogram(j, bound)) for j, bound in enumerate(bounds) if bound.chosen]
    # MATERIALIZED: each histogram is read once per candidate by the choice; inlined, it would
    # be recomputed each time. The other parts are read more than once, so they are anyway,
    # but for one-row partials: read again from the table (three times, each scan free to run
    # in parallel) rather than stored, one row per table row (measured at 10M rows: 10.7x the
    # plain query stored, 5.7x read again; the same snapshot, so the same rows each time).
    inlined = {"q": False} if one_row_cells else {}
    cells = [("qc", _row_table_query(plan, exact, counted.copy()))] if by_rows else []
    for name, part in [("q", q), *cells, ("t", t), *histograms, ("b", b), ("s", s), ("w", w),
                       ("lost", lost), ("clipped", clipped)]:
        outer = outer.with_(name, as_=part, materialized=True if name.startswith("h")
                            else inlined.get(name), copy=False)
    return outer


def _loss_terms_sql(terms: list[LossTerm], row: str | None = None) -> str:
    """The terms of a loss cap as SQL, each bound's value read from ``b`` (or from the columns
    ``row.b<k>`` of a row that carries them)."""
    return ", ".join((f"{c} - {a} * {row}.b{k}" if row else f"{c} - {a} * (SELECT b{k} FROM b)")
                     if k is not None else str(c) for c, a, k in terms)


def _total(j: int, bound: Bound) -> str:
    """The column of ``t`` holding an individual's total for bound j."""
    return "n_rows" if bound.subject == "rows" else f"tot{j}"


def _histogram(j: int, bound: Bound) -> exp.Select:
    """``h<j>``: the individuals of ``t`` counted by their slot among bound j's candidates (the
    number of candidates below their total), one pass with width_bucket (module notes, 3)."""
    return _select(
        f"SELECT width_bucket({_total(j, bound)}::numeric, "
        f"ARRAY[{', '.join(str(c + 1) for c in bound.candidates)}]::numeric[]) AS slot, "
        f"COUNT(*) AS n FROM t GROUP BY 1")


def _choice_sql(j: int, bound: Bound) -> str:
    """The noisy-max choice of bound j among its candidates (module notes, 2): the candidate
    with the highest ``noise_k - |above_k - A|``, ties to the smallest. ``above_k`` (the
    individuals whose total exceeds candidate k) comes from the histogram ``h<j>`` of the totals
    over the candidates, counted in one pass with width_bucket: an individual's slot is the
    number of candidates below its total. The engine passes ``A,noise_1,...,noise_G`` in a
    setting."""
    grid = ", ".join(f"({k}, {c})" for k, c in enumerate(bound.candidates, start=1))
    setting = f"current_setting('{BOUND_NOISE_SETTING.format(j)}')"
    return (
        f"SELECT g.tau FROM (VALUES {grid}) AS g(k, tau) "
        f"ORDER BY CAST(split_part({setting}, ',', g.k + 1) AS bigint) "
        f"- ABS(COALESCE((SELECT SUM(h.n) FROM h{j} AS h WHERE h.slot >= g.k), 0) "
        f"- CAST(split_part({setting}, ',', 1) AS bigint)) DESC, g.k LIMIT 1")


def _cell_ordinal(plan: Plan) -> exp.Expression:
    """Per row, the ordinal of its cell in domain order (``i0 * n1 * ... + i1 * n2 * ... +
    ...``, the order of ``ORDER BY i0, i1, ...``), NULL when a key lies outside its declared
    domain (such rows fall in no cell, as the inner joins of ``_in_domains`` drop them). Each
    key's ordinal is matched with ``_key_matches``, the joins' own condition, on the key's
    value computed once per row as ``hushql_key<j>`` (``_wide_individual_query``)."""
    policy = plan.table
    ordinal: exp.Expression | None = None
    for j, key in enumerate(plan.keys):
        values = key_values(_key_column(policy, key), key)
        own = exp.Case(ifs=[exp.If(this=_key_matches(key, policy, exp.column(f"{WIDE_KEY_PREFIX}{j}"),
                                                     number_node(i) if key.form == "case" else value_node(v)),
                                   true=number_node(i)) for i, v in enumerate(values)])
        ordinal = own if ordinal is None else exp.Add(
            this=exp.Mul(this=exp.paren(ordinal, copy=False), expression=number_node(len(values))),
            expression=own)
    assert ordinal is not None
    return ordinal


def _wide_individual_query(plan: Plan, bounds: tuple[Bound, ...], measure_bounds: tuple[int, ...],
                           exact: frozenset[str], cells: int, middle: bool = False,
                           kept: tuple[str, ...] = ()) -> exp.Select:
    """The per-individual rewrite with one row per individual and each cell's partials as
    columns (module notes 11): the same partials, totals, bounds, kept shares, cell sums and
    clipped-away totals as ``_individual_table_query``, computed by a grouping per (individual,
    cell), one per individual and one aggregate over individuals. Must hold: 0 < cells, few
    enough that a row's cell columns stay cheap (the backend's ``wide_cells``)."""
    policy = plan.table
    assert policy.individual is not None
    n_measures = len(plan.measures)
    cell_range = range(cells)
    # q: per individual and cell (its ordinal, computed per row from each key's value), its
    # rows and partials, as the joined shape's q. p: per individual, per cell c, its rows r_c
    # (0 where it has no row in c) and partials m<n>_c (q's one row of the pair; NULL where it
    # has none: no partial, as the joined shape has no row for it, and NULL adds nothing to
    # any total, running size, kept share or cell).
    keyed = _filtered(plan, exp.Select().select(exp.Star(), *[
        exp.alias_(_key_expression(policy, key), f"{WIDE_KEY_PREFIX}{j}", copy=False)
        for j, key in enumerate(plan.keys)], copy=False)).where(_counted(plan, kept), copy=False)
    celled = exp.Select().select(
        exp.Star(), exp.alias_(_cell_ordinal(plan) if plan.keys else number_node(0),
                               WIDE_CELL_COLUMN, copy=False), copy=False).from_(
        exp.Subquery(this=keyed, alias=exp.TableAlias(this=exp.to_identifier("k"))), copy=False)
    partials = [exp.alias_(exp.Count(this=exp.Star()), "r", copy=False)] + [
        exp.alias_(_partial(policy, m, exact), f"m{n}", copy=False)
        for n, m in enumerate(plan.measures)]
    q = exp.Select().select(
        exp.alias_(column_node(policy.individual.column), "who", copy=False),
        exp.column(WIDE_CELL_COLUMN), *partials, copy=False).from_(
        exp.Subquery(this=celled, alias=exp.TableAlias(this=exp.to_identifier("x"))), copy=False
    ).group_by(number_node(1), number_node(2), copy=False)
    pivot = []
    for c in cell_range:
        pivot.append(f"SUM(CASE WHEN {WIDE_CELL_COLUMN} = {c} THEN r ELSE 0 END) AS r_{c}")
        pivot += [f"MAX(CASE WHEN {WIDE_CELL_COLUMN} = {c} THEN m{n} END) AS m{n}_{c}"
                  for n in range(n_measures)]
    # Rows outside the domains (a NULL cell) are grouped in q and left out here, where no
    # filter can be pushed back into the scan (Spark would copy the cell's CASE into it once
    # per branch); individuals with no row in any cell are left out, as from the joined t.
    # (Grouping per (individual, cell) first, then per individual, measured faster on Spark
    # than one grouping per individual with a conditional aggregate per cell: by month at 10M
    # rows 3.8 s against 4.9 s, by district 2.1 s against 1.9 s.)
    p = _select(f"SELECT who, {', '.join(pivot)} FROM q GROUP BY who "
                f"HAVING COUNT({WIDE_CELL_COLUMN}) > 0")
    # t: its totals (n_rows, touched, tot<j>: NULL when every partial of the sum is NULL, as
    # SUM over no value), and per cell the running sizes up to and including it.
    sizes = {"r": [f"r_{c}" for c in cell_range]}
    for n, measure in enumerate(plan.measures):
        if measure.kind != "count_individuals":
            sizes[f"m{n}"] = [f"ABS(m{n}_{c})" if measure.kind in _SIGNED_KINDS else f"m{n}_{c}"
                              for c in cell_range]
    totals = ["p.*", " + ".join(f"r_{c}" for c in cell_range) + " AS n_rows",
              " + ".join(f"CASE WHEN r_{c} > 0 THEN 1 ELSE 0 END" for c in cell_range) + " AS touched"]
    for j, bound in enumerate(bounds):
        if bound.subject != "rows":
            n = measure_bounds.index(j)
            totals.append(f"CASE WHEN {' AND '.join(f'm{n}_{c} IS NULL' for c in cell_range)} THEN NULL "
                          f"ELSE {' + '.join(f'COALESCE(ABS(m{n}_{c}), 0)' for c in cell_range)} END AS tot{j}")
    if plan.keys:
        for name, parts in sizes.items():
            totals += [" + ".join(f"COALESCE({part}, 0)" for part in parts[:c + 1]) + f" AS run_{name}_{c}"
                       for c in cell_range]
    t = _select(f"SELECT {', '.join(totals)} FROM p")
    b = _select("SELECT " + ", ".join(
        f"({_choice_sql(j, bound)}) AS b{j}" if bound.chosen
        else f"{bound.ceiling} AS b{j}" for j, bound in enumerate(bounds)))
    rows_bound = next((j for j, bound in enumerate(bounds) if bound.subject == "rows"), None)

    def share(name: str, c: int, size: str) -> str:  # a partial's kept share (module notes, 4)
        return _kept(size, f"t.run_{name}_{c}" if plan.keys else None, bounds, half=middle)
    # w: per individual, each cell's kept shares (NULL where it has no partial).
    shares = []
    for c in cell_range:
        shares.append(f"{share('r', c, f't.r_{c}')} AS r_kept_{c}")
        for n, measure in enumerate(plan.measures):
            if measure.kind == "count_individuals":
                kept_share = f"CASE WHEN t.touched <= b.b{rows_bound} THEN t.m{n}_{c} ELSE 0 END"
            elif measure.kind in _SIGNED_KINDS:
                kept_share = f"SIGN(t.m{n}_{c}) * ({share(f'm{n}', c, f'ABS(t.m{n}_{c})')})"
            else:
                kept_share = share(f"m{n}", c, f"t.m{n}_{c}")
            shares.append(f"CASE WHEN t.m{n}_{c} IS NOT NULL THEN {kept_share} END AS k{n}_{c}")
    w = _select(f"SELECT t.*, b.*, {', '.join(shares)} FROM t CROSS JOIN b")
    # a: per cell and measure the sum of the kept shares; per bound the clipped-away total,
    # each individual's amount (rows, or the L1 of a sum's partials, lost) capped.
    lost = []
    for j, bound in enumerate(bounds):
        if bound.subject == "rows":
            lost.append(" + ".join(f"(w.r_{c} - w.r_kept_{c})" for c in cell_range))
        else:
            n = measure_bounds.index(j)
            lost.append(" + ".join(f"COALESCE(ABS(w.m{n}_{c}) - ABS(w.k{n}_{c}), 0)" for c in cell_range))
    sums = [f"COALESCE(SUM(w.k{n}_{c}), 0) AS s{n}_{c}" for c in cell_range for n in range(n_measures)]
    caps = [f"COALESCE(SUM(LEAST({amount}, GREATEST({_loss_terms_sql(loss_terms(bounds, j), 'w')})"
            f" + {ROUNDING_LOSS})), 0) AS clipped{j}" for j, amount in enumerate(lost)]
    a = _select(f"SELECT {', '.join(sums + caps)} FROM w")
    # One row per cell, in domain order: its ordinals, its measures, the bounds, the clipped.
    tail = [f"b.b{j}" for j in range(len(bounds))] + [f"a.clipped{j}" for j in range(len(bounds))]
    if plan.keys:
        measures = [f"CASE c.cell {' '.join(f'WHEN {c} THEN a.s{n}_{c}' for c in cell_range)} END AS m{n}"
                    for n in range(n_measures)]
        ordinals = [f"c.i{j}" for j in range(len(plan.keys))]
        listed = ", ".join(f"({', '.join(str(x) for x in (c,) + ordinal)})"
                           for c, ordinal in enumerate(_cell_ordinals(plan)))
        outer = _select(f"SELECT {', '.join(ordinals + measures + tail)} FROM (VALUES {listed}) "
                        f"AS c(cell, {', '.join(f'i{j}' for j in range(len(plan.keys)))}) "
                        f"CROSS JOIN a CROSS JOIN b ORDER BY {', '.join(ordinals)}")
    else:
        outer = _select(f"SELECT {', '.join([f'a.s{n}_0 AS m{n}' for n in range(n_measures)] + tail)} "
                        "FROM a CROSS JOIN b")
    histograms = [(f"h{j}", _histogram(j, bound)) for j, bound in enumerate(bounds) if bound.chosen]
    for name, part in [("q", q), ("p", p), ("t", t), *histograms, ("b", b), ("w", w), ("a", a)]:
        outer = outer.with_(name, as_=part, materialized=True if name.startswith("h") else None,
                            copy=False)
    return outer


def _cell_ordinals(plan: Plan) -> list[tuple[int, ...]]:
    """Each cell's key ordinals (i0, i1, ...), in domain order (the order of ``_cell_ordinal``)."""
    return list(itertools.product(*(range(key_size(_key_column(plan.table, key), key))
                                    for key in plan.keys)))
