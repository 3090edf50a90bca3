/**
 * Small pure formatting helpers shared by the list and the details view, and the phase table.
 */

/**
 * Every phase the sidebar can meet, in the families the badges, the filter menu and the notebook
 * card share (jobdesk/progress.py FAMILIES): the UWS 1.1 phases (§2.1.3) plus our own UNSENT,
 * SUBMITTED, LOST and UNREACHED (the service was never reached, the job never created).
 */
export type PhaseFamily = 'waiting' | 'running' | 'done' | 'failed' | 'stopped';

export const PHASE_FAMILY: Readonly<Record<string, PhaseFamily>> = {
  UNSENT: 'waiting',
  SUBMITTED: 'waiting',
  PENDING: 'waiting',
  QUEUED: 'waiting',
  HELD: 'waiting',
  SUSPENDED: 'waiting',
  UNKNOWN: 'waiting',
  EXECUTING: 'running',
  COMPLETED: 'done',
  ERROR: 'failed',
  LOST: 'failed',
  UNREACHED: 'failed',
  ABORTED: 'stopped',
  ARCHIVED: 'stopped'
};

/** The family of a phase; a phase this table does not know yet waits, as UNKNOWN does. */
export function phaseFamily(phase: string): PhaseFamily {
  return PHASE_FAMILY[phase] ?? 'waiting';
}

/** Phases after which nothing more happens on the service (UWS 1.1 §2.1.3, plus ours). */
export const TERMINAL = new Set(['COMPLETED', 'ERROR', 'ABORTED', 'ARCHIVED', 'LOST', 'UNREACHED']);

/** Phases worth watching: recorded here, waiting, or running on the service. */
export const ACTIVE = [
  'UNSENT',
  'SUBMITTED',
  'PENDING',
  'QUEUED',
  'EXECUTING',
  'UNKNOWN',
  'HELD',
  'SUSPENDED'
];

function family(name: PhaseFamily): string {
  return Object.keys(PHASE_FAMILY)
    .filter(phase => PHASE_FAMILY[phase] === name)
    .join(',');
}

/**
 * Filter choices of the phase menu: [label, comma-separated phases]. Besides "all" and
 * "active", one choice per family, so every phase is under one of them.
 */
export const PHASE_FILTERS: Array<[string, string]> = [
  ['All phases', ''],
  ['Active', ACTIVE.join(',')],
  ['Waiting', family('waiting')],
  ['Executing', family('running')],
  ['Completed', family('done')],
  ['Failed', family('failed')],
  ['Aborted or archived', family('stopped')]
];

/** What a job not yet executing is doing, in words true to its phase ({t}: how long). */
const WAITING_WORDS: Readonly<Record<string, string>> = {
  UNSENT: 'not sent yet, {t}',
  SUBMITTED: 'sent {t} ago',
  PENDING: 'pending {t}',
  QUEUED: 'queued {t}',
  HELD: 'held {t}',
  SUSPENDED: 'suspended {t}',
  UNKNOWN: 'phase unknown, {t}'
};

/** The times a job's time cell needs (unix seconds). */
export interface IJobTimes {
  phase: string;
  created: number;
  submitted?: number | null;
  started?: number | null;
  finished?: number | null;
  unreachable_since?: number | null;
  next_try?: number | null;
  service_started?: number | null;
  service_finished?: number | null;
}

/**
 * "queued 12 s" only while QUEUED ("pending 4 s", "not sent yet, 9 s", ... otherwise), then
 * "running 3 min 02 s" / "ran 3 min 02 s"; a job that ended before it started "ended after".
 * While the service does not answer: "service unreachable for 40 s, retrying (next try in 5 s)".
 * A finished job whose service gave startTime and endTime: how long it ran by that clock.
 */
export function timeWords(job: IJobTimes, now: number): string {
  const active = !TERMINAL.has(job.phase);
  if (active && job.unreachable_since) {
    const next = job.next_try
      ? ` (next try in ${formatDuration(Math.max(0, job.next_try - now))})` : '';
    return `service unreachable for ${formatDuration(now - job.unreachable_since)}, retrying${next}`;
  }
  if (job.phase === 'UNREACHED') {
    return 'never reached the service';
  }
  if (!active && job.service_started && job.service_finished) {
    // The service's own clock (UWS startTime to endTime), not when this side looked.
    return `ran ${formatDuration(job.service_finished - job.service_started)} (service clock)`;
  }
  const start = job.started || (job.phase === 'EXECUTING' ? job.submitted : null);
  if (start) {
    return `${active ? 'running' : 'ran'} ${formatDuration((job.finished || now) - start)}`;
  }
  if (active) {
    const since = job.phase === 'UNSENT' ? job.created : job.submitted || job.created;
    const words = WAITING_WORDS[job.phase] ?? 'waiting {t}';
    return words.replace('{t}', formatDuration(now - since));
  }
  const took = formatDuration((job.finished || now) - job.created);
  return job.phase === 'COMPLETED' ? `took ${took}` : `ended after ${took}`;
}

/** "1 result", "12 results". */
export function plural(count: number, word: string): string {
  return `${count.toLocaleString('en-US')} ${word}${count === 1 ? '' : 's'}`;
}

export function formatBytes(bytes: number | null | undefined): string {
  if (bytes === null || bytes === undefined) {
    return '';
  }
  const units = ['B', 'kB', 'MB', 'GB', 'TB'];
  let value = bytes;
  let unit = 0;
  while (value >= 1000 && unit < units.length - 1) {
    value /= 1000;
    unit += 1;
  }
  return unit === 0 ? `${value} B` : `${value.toFixed(value < 10 ? 1 : 0)} ${units[unit]}`;
}

export function formatDuration(seconds: number): string {
  const s = Math.max(0, Math.floor(seconds));
  if (s < 60) {
    return `${s} s`;
  }
  const m = Math.floor(s / 60);
  if (m < 60) {
    return `${m} min ${String(s % 60).padStart(2, '0')} s`;
  }
  const h = Math.floor(m / 60);
  if (h < 48) {
    return `${h} h ${String(m % 60).padStart(2, '0')} min`;
  }
  return `${Math.floor(h / 24)} d`;
}

export function formatRows(rows: number | null | undefined): string {
  return rows === null || rows === undefined ? '' : `${rows.toLocaleString('en-US')} rows`;
}

export function formatWhen(unixSeconds: number | null | undefined): string {
  if (!unixSeconds) {
    return '';
  }
  return new Date(unixSeconds * 1000).toISOString().replace('T', ' ').slice(0, 19) + ' UTC';
}

export function hostOf(service: string): string {
  try {
    return new URL(service).host;
  } catch {
    return service;
  }
}

export function baseName(path: string | null | undefined): string {
  if (!path) {
    return '';
  }
  const parts = path.split(/[\\/]/);
  return parts[parts.length - 1];
}

/** The first non-blank line of the query, used when a job has no label. */
export function firstLine(text: string | null | undefined): string {
  for (const line of (text || '').split('\n')) {
    if (line.trim()) {
      return line.trim();
    }
  }
  return '';
}
