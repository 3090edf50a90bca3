import { JupyterFrontEnd, JupyterFrontEndPlugin } from '@jupyterlab/application';

const plugin: JupyterFrontEndPlugin<void> = {
  id: 'jobdesk-labextension:sidebar',
  autoStart: true,
  activate: (app: JupyterFrontEnd) => {
    console.log('jobdesk', app.name);
  }
};
export default plugin;
