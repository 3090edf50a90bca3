/**
 * The jobdesk JupyterLab extension: a "Job desk" sidebar over the server's REST API, job
 * details in the main area, snippets into notebooks, notifications when jobs finish, and the
 * browser half of the notebook card's "Abort job" button.
 */
import {
  ILayoutRestorer,
  JupyterFrontEnd,
  JupyterFrontEndPlugin
} from '@jupyterlab/application';
import {
  Clipboard,
  Dialog,
  InputDialog,
  MainAreaWidget,
  Notification,
  showDialog
} from '@jupyterlab/apputils';
import { INotebookTracker, NotebookActions } from '@jupyterlab/notebook';
import { ISettingRegistry } from '@jupyterlab/settingregistry';

import { AnalysesView } from './analyses';
import { announcementKey, claimAnnouncement } from './announce';

import { JobDetails } from './details';
import { firstLine, formatDuration, formatRows } from './format';
import { jobdeskIcon } from './icon';
import { IJobRecord, JobDeskModel } from './model';
import { IPanelActions, JobDeskPanel } from './panel';
import servicesPlugin from './servicesplugin';

const PLUGIN_ID = 'jobdesk-labextension:sidebar';

/** Completed jobs that ran at least this long are announced (common practice, no source);
 * the user's setting `notifyAfterSeconds` overrides it. */
const NOTIFY_AFTER_SECONDS = 10;

const plugin: JupyterFrontEndPlugin<void> = {
  id: PLUGIN_ID,
  description: 'A sidebar listing jobdesk query jobs, their phases, results and cache.',
  autoStart: true,
  optional: [ILayoutRestorer, INotebookTracker, ISettingRegistry],
  activate: (
    app: JupyterFrontEnd,
    restorer: ILayoutRestorer | null,
    notebooks: INotebookTracker | null,
    registry: ISettingRegistry | null
  ) => {
    const prefs = { notifications: true, notifyAfterSeconds: NOTIFY_AFTER_SECONDS };
    if (registry) {
      void registry.load(PLUGIN_ID).then(
        settings => {
          const read = () => {
            prefs.notifications = settings.get('notifications').composite !== false;
            const after = Number(settings.get('notifyAfterSeconds').composite);
            prefs.notifyAfterSeconds = Number.isFinite(after) ? after : NOTIFY_AFTER_SECONDS;
          };
          read();
          settings.changed.connect(read);
        },
        () => undefined // no schema (e.g. an old install): keep the defaults
      );
    }
    const model = new JobDeskModel();
    const openDetails = new Map<string, MainAreaWidget<JobDetails>>();
    let analysesView: MainAreaWidget<AnalysesView> | null = null;

    const title = (job: IJobRecord) => job.label || firstLine(job.adql).slice(0, 60) || job.id;

    const actions: IPanelActions = {
      openDetails(job) {
        let widget = openDetails.get(job.id);
        if (!widget || widget.isDisposed) {
          const content = new JobDetails(model, actions, job.id, job);
          widget = new MainAreaWidget({ content });
          widget.id = `${content.id}-area`; // ids are unique in a page (the content keeps its own)
          widget.title.icon = jobdeskIcon;
          widget.title.label = content.title.label;
          content.title.changed.connect(() => (widget!.title.label = content.title.label));
          openDetails.set(job.id, widget);
          app.shell.add(widget, 'main');
        }
        app.shell.activateById(widget.id);
      },
      async insertSnippet(job) {
        const panel = notebooks?.currentWidget;
        if (!panel) {
          Notification.warning('Open a notebook first: the snippet goes below its active cell.', {
            autoClose: 5000
          });
          return;
        }
        try {
          const code = await model.snippet(job.id);
          NotebookActions.insertBelow(panel.content);
          panel.content.activeCell?.model.sharedModel.setSource(code.trimEnd());
          app.shell.activateById(panel.id);
        } catch (err) {
          Notification.error(`Could not get the snippet: ${(err as Error).message}`);
        }
      },
      async copySnippet(job) {
        try {
          Clipboard.copyToSystem(await model.snippet(job.id));
          Notification.info('Snippet copied.', { autoClose: 2000 });
        } catch (err) {
          Notification.error(`Could not get the snippet: ${(err as Error).message}`);
        }
      },
      async abort(job) {
        try {
          const after = await model.abort(job.id);
          Notification.info(`Aborted: ${title(after)}`, { autoClose: 4000 });
        } catch (err) {
          Notification.error(`Abort failed: ${(err as Error).message}`);
        }
      },
      async resend(job) {
        try {
          const fresh = await model.resend(job.id);
          Notification.info(`Sent again as a new job: ${title(fresh)}`, { autoClose: 4000 });
          actions.openDetails(fresh);
        } catch (err) {
          Notification.error(`Sending again failed: ${(err as Error).message}`);
        }
      },
      async editInNotebook(job) {
        const panel = notebooks?.currentWidget;
        if (!panel) {
          Notification.warning('Open a notebook first: the query goes below its active cell.', {
            autoClose: 5000
          });
          return;
        }
        try {
          const code = await model.queryCode(job.id);
          NotebookActions.insertBelow(panel.content);
          panel.content.activeCell?.model.sharedModel.setSource(code.trimEnd());
          app.shell.activateById(panel.id);
        } catch (err) {
          Notification.error(`Could not get the query: ${(err as Error).message}`);
        }
      },
      async pin(job) {
        try {
          await model.pin(job.id, true);
          Notification.info(`Pinned: ${title(job)} stays through every prune.`, { autoClose: 4000 });
        } catch (err) {
          Notification.error(`Pin failed: ${(err as Error).message}`);
        }
      },
      async exportResult(job) {
        const answer = await InputDialog.getText({
          title: 'Export the result with its provenance',
          label: 'File (relative to the server root; .fits .vot .parquet .csv)',
          text: `${job.id}.fits`
        });
        if (!answer.button.accept || !answer.value) {
          return;
        }
        try {
          const written = await model.exportTo(job.id, answer.value);
          Notification.success(`Exported: ${written.join(', ')}`, { autoClose: 6000 });
        } catch (err) {
          Notification.error(`Export failed: ${(err as Error).message}`);
        }
      },
      async editLabel(job) {
        const answer = await InputDialog.getText({
          title: 'Label',
          text: job.label || ''
        });
        if (!answer.button.accept) {
          return;
        }
        try {
          await model.setLabel(job.id, answer.value || '');
          openDetails.get(job.id)?.content.load();
        } catch (err) {
          Notification.error(`Label change failed: ${(err as Error).message}`);
        }
      },
      openAnalyses() {
        if (analysesView && !analysesView.isDisposed) {
          void analysesView.content.load();
          app.shell.activateById(analysesView.id);
          return;
        }
        const content = new AnalysesView(model);
        analysesView = new MainAreaWidget({ content });
        analysesView.id = 'jobdesk-analyses-area';
        analysesView.title.label = 'Analyses and re-runs';
        analysesView.title.icon = jobdeskIcon;
        app.shell.add(analysesView, 'main');
        app.shell.activateById(analysesView.id);
      },
      async forget(job) {
        const answer = await showDialog({
          title: 'Forget this job?',
          body:
            `“${title(job)}” leaves the index. The service job is not touched; ` +
            'a cached result stays until the cache is pruned.',
          buttons: [Dialog.cancelButton(), Dialog.warnButton({ label: 'Forget' })]
        });
        if (!answer.button.accept) {
          return;
        }
        try {
          await model.forget(job.id);
          openDetails.get(job.id)?.dispose();
        } catch (err) {
          Notification.error(`Forget failed: ${(err as Error).message}`);
        }
      }
    };

    const panel = new JobDeskPanel(model, actions);
    panel.title.icon = jobdeskIcon;
    panel.title.label = 'Job desk';
    app.shell.add(panel, 'left', { rank: 600 });
    if (restorer) {
      restorer.add(panel, 'jobdesk-sidebar');
    }

    // Announce jobs this lab followed when they end (and, later, if their result is cut);
    // once per browser profile across reloads and tabs (see announce.ts).
    const followed = new Set<string>();
    const announce = async (job: IJobRecord): Promise<void> => {
      if (!prefs.notifications || !(await claimAnnouncement(announcementKey(job)))) {
        return;
      }
      // The duration said is the service's own (startTime to endTime), when it gave one.
      const own = job.service_started && job.service_finished
        ? ` after ${formatDuration(job.service_finished - job.service_started)} on the service`
        : '';
      const words = `${title(job)} — ${job.phase.toLowerCase()}${own}` +
        (job.rows !== null && job.rows !== undefined ? `, ${formatRows(job.rows)}` : '');
      const buttons: Array<{ label: string; callback: () => void; caption?: string }> = [
        { label: 'Open details', caption: 'Show this job in the main area', callback: () => actions.openDetails(job) }
      ];
      if (job.phase === 'COMPLETED') {
        buttons.push({
          label: 'Insert code',
          caption: 'Insert Python that loads the result below the active cell',
          callback: () => void actions.insertSnippet(job)
        });
      }
      const options = { autoClose: 10000 as number | false, actions: buttons };
      if (job.phase === 'COMPLETED' && job.truncated) {
        Notification.warning(`Result truncated (not the full answer): ${words}`, options);
      } else if (job.phase === 'COMPLETED') {
        Notification.success(`Job finished: ${words}`, options);
      } else {
        Notification.warning(`Job ended: ${words}`, options);
      }
    };
    model.finished.connect((_, job) => {
      followed.add(job.id);
      const ran = (job.finished || Date.now() / 1000) - (job.started || job.created);
      if (ran < prefs.notifyAfterSeconds && job.phase === 'COMPLETED' && !job.truncated) {
        return;
      }
      void announce(job);
    });
    model.changed.connect(() => {
      for (const job of model.jobs) {
        if (followed.has(job.id) && job.phase === 'COMPLETED' && job.truncated) {
          followed.delete(job.id);
          void announce(job);
        }
      }
    });

    // The notebook card's "Abort job" button: the kernel is busy inside wait() and cannot receive
    // the click, so the browser aborts the job through the REST API (see jobdesk/progress.py).
    document.addEventListener(
      'click',
      event => {
        const target = (event.target as HTMLElement | null)?.closest?.('.jobdesk-cancel');
        const jobClass = target && Array.from(target.classList).find(c => c.startsWith('jobdesk-job-'));
        if (jobClass) {
          const id = jobClass.slice('jobdesk-job-'.length);
          model.abort(id).catch(err => Notification.error(`Abort failed: ${err.message}`));
        }
      },
      true
    );

    app.commands.addCommand('jobdesk:analyses', {
      label: 'Show analyses and release re-runs',
      icon: jobdeskIcon,
      execute: () => actions.openAnalyses()
    });

    app.commands.addCommand('jobdesk:open', {
      label: 'Show the Job desk',
      icon: jobdeskIcon,
      execute: () => app.shell.activateById(panel.id)
    });

    void app.restored.then(() => model.start());
  }
};

export default [plugin, servicesPlugin];
